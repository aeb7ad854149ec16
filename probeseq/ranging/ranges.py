"""Mass-to-charge ranges: :class:`Range` and :class:`RangeSet`, their TOML layout and checks.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..exceptions import InputError
from ..utils.marks import MARK
from ..utils.tomlfile import clean_text, load_toml, loads_toml, short_repr
from .isotopes import MAX_CHARGE, canonical_formula, ion_label, parse_formula, parse_ion

__all__ = ['MAX_RANGE_DA', 'Range', 'RangeSet']

#: highest mass-to-charge a range may reach, Da (the lookup table spans 0 to the highest range edge)
MAX_RANGE_DA = 2000.0


# ============================================================================ ranges
@dataclass(frozen=True)
class Range:
    """One mass-to-charge window assigned to an ion species.

    Parameters
    ----------
    low_da, high_da : float, Da
        Window ``low_da <= m/z < high_da``.
    formula : str
        Main species of the window (canonical formula).
    charge : int
        Its charge state.
    shares : tuple of (str, int, float)
        Optional ``(formula, charge, fraction)`` of the window's ions per species; the rest is
        background. Empty means all ions are of ``formula`` at ``charge``.
    """

    low_da: float
    high_da: float
    formula: str
    charge: int
    shares: tuple = ()

    @property
    def label(self) -> str:
        """Ion label of the main species, e.g. ``'ZnO+'``, ``'Zn++'``."""
        return ion_label(self.formula, self.charge)

    def species_shares(self) -> tuple:
        """``((formula, charge), fraction)`` pairs (the main species with 1 when no shares)."""
        if not self.shares:
            return (((self.formula, self.charge), 1.0),)
        return tuple(((f, z), float(p)) for f, z, p in self.shares)


def _real(v) -> bool:
    """Whether ``v`` is a finite real number (not a bool)."""
    if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)):
        return False
    try:
        return math.isfinite(v)
    except OverflowError:  # an integer beyond the float range
        return False


def _check_range_fields(low, high, formula, charge, shares, where):
    """Validate one range's values; return a Range.

    ``low`` and ``high`` are finite numbers with ``0 < low < high <= MAX_RANGE_DA`` (Da), ``charge``
    an integer from 1 to :data:`~probeseq.ranging.isotopes.MAX_CHARGE`, ``formula`` a formula of at most
    :data:`~probeseq.ranging.isotopes.MAX_FORMULA_ATOMS` atoms.
    """
    for name, v in (("low", low), ("high", high)):
        if not _real(v):
            raise InputError(f"{where}: '{name}' must be a number in Da (finite), got {short_repr(v)}")
    if low <= 0:
        raise InputError(f"{where}: 'low' must be positive, got {low}")
    if low >= high:
        raise InputError(f"{where}: 'low' ({low}) must be below 'high' ({high})")
    if high > MAX_RANGE_DA:
        raise InputError(f"{where}: 'high' = {high:g} Da is above {MAX_RANGE_DA:g} Da, the largest mass-to-charge "
                         "a range may reach")
    if not isinstance(formula, str):
        raise InputError(f"{where}: 'formula' must be a string such as \"CoOH\", got {short_repr(formula)}")
    try:
        formula = canonical_formula(formula)
    except InputError as e:
        raise InputError(f"{where}: {e}") from None
    if isinstance(charge, bool) or not isinstance(charge, (int, np.integer)) or not 1 <= charge <= MAX_CHARGE:
        raise InputError(f"{where}: 'charge' must be an integer >= 1 and <= {MAX_CHARGE}, got {short_repr(charge)}")
    out = []
    if shares:
        items = shares.items() if isinstance(shares, dict) else [(ion_label(f, z), p) for f, z, p in shares]
        total = 0.0
        for key, p in items:
            try:
                f, z = parse_ion(key)
            except InputError as e:
                raise InputError(f"{where}: shares: {e}") from None
            if not _real(p) or not 0 <= p <= 1:
                raise InputError(f"{where}: shares: fraction of {short_repr(key)} must be a number in [0, 1], "
                                 f"got {short_repr(p)}")
            out.append((f, z, float(p)))
            total += p
        if total > 1 + 1e-6:
            raise InputError(f"{where}: shares add up to {total:.4f}, more than 1")
        if (formula, charge) not in {(f, z) for f, z, _ in out}:
            raise InputError(f"{where}: shares must include the range's own species "
                             f"'{ion_label(formula, charge)}'")
    return Range(float(low), float(high), formula, int(charge), tuple(out))


def _check_overlaps(ranges, where_of):
    """Raise on overlapping windows; ranges sorted by low (where_of(i) names range i)."""
    for i in range(len(ranges) - 1):
        a, b = ranges[i], ranges[i + 1]
        if b.low_da < a.high_da:
            span = f"{a.low_da:g}-{a.high_da:g} Da and {b.low_da:g}-{b.high_da:g} Da"
            if (a.formula, a.charge) == (b.formula, b.charge):
                raise InputError(f"{where_of(i)} and {where_of(i + 1)}: overlapping ranges of the same species "
                                 f"{a.label} ({span})")
            raise InputError(f"{where_of(i)} ({a.label}) and {where_of(i + 1)} ({b.label}) overlap ({span}); "
                             "a peak shared by several species is one range listing them in 'shares'")


@dataclass(frozen=True)
class RangeSet:
    """Non-overlapping mass-to-charge ranges, sorted by their low edge.

    Parameters
    ----------
    ranges : tuple of Range
    metals : tuple of str
        Metals of the run (informational; written to and read from the file).
    source : str
        File the ranges came from, for messages.
    """

    ranges: tuple
    metals: tuple = ()
    source: str = field(default="", compare=False)

    def __post_init__(self):
        rs = tuple(self.ranges)
        for i, r in enumerate(rs):
            if not isinstance(r, Range):
                raise InputError(f"ranges: item {i + 1} is not a Range, got {type(r).__name__}")
            _check_range_fields(r.low_da, r.high_da, r.formula, r.charge, r.shares, f"range {i + 1} ({r.label})")
        order = sorted(range(len(rs)), key=lambda i: (rs[i].low_da, rs[i].high_da))
        srt = tuple(rs[i] for i in order)
        _check_overlaps(srt, lambda i: f"range {order[i] + 1}")
        object.__setattr__(self, "ranges", srt)
        object.__setattr__(self, "metals", tuple(self.metals))

    def __len__(self) -> int:
        return len(self.ranges)

    def __iter__(self):
        return iter(self.ranges)

    def __getitem__(self, i) -> Range:
        return self.ranges[i]

    @property
    def lows_da(self) -> np.ndarray:
        """(n_ranges,) low edges, Da."""
        return np.array([r.low_da for r in self.ranges], dtype=np.float64)

    @property
    def highs_da(self) -> np.ndarray:
        """(n_ranges,) high edges, Da."""
        return np.array([r.high_da for r in self.ranges], dtype=np.float64)

    def species(self) -> tuple:
        """Distinct ``(formula, charge)`` named by the ranges (main species and shares), in order."""
        seen = {}
        for r in self.ranges:
            seen.setdefault((r.formula, r.charge), None)
            for (f, z), _ in r.species_shares():
                seen.setdefault((f, z), None)
        return tuple(seen)

    # ------------------------------------------------------------------ TOML
    def to_toml(self, path=None, notes=None) -> str:
        """Write the range file (layout in the module docstring).

        Parameters
        ----------
        path : str or Path, optional
            Where to write; the text is returned either way.
        notes : sequence of str, optional
            One comment per range, written under it.

        Returns
        -------
        str
        """
        lines = [
            f"# probeseq range file (format 1), {MARK}. One [[range]] per mass-to-charge window:",
            "#   formula, charge: the ion species; low <= m/z < high, in Da.",
            "#   shares (optional): fraction of the window's ions per species (\"Ni+\", \"Zn++\": formula,",
            "#   one '+' per charge); the rest is background. Delete shares after moving a window.",
            "format = 1",
        ]
        if self.metals:
            lines.append("metals = [" + ", ".join(f'"{m}"' for m in self.metals) + "]")
        for i, r in enumerate(self.ranges):
            lines += ["", "[[range]]", f'formula = "{r.formula}"', f"charge = {r.charge}",
                      f"low = {_fmt(r.low_da)}", f"high = {_fmt(r.high_da)}"]
            if r.shares:
                items = ", ".join(f'"{ion_label(f, z)}" = {p:.6g}' for f, z, p in r.shares)
                lines.append(f"shares = {{ {items} }}")
            if notes is not None and notes[i]:
                lines.append(f"# {notes[i]}")
        text = "\n".join(lines) + "\n"
        if path is not None:
            Path(path).write_text(text)
        return text

    @classmethod
    def from_toml(cls, path) -> "RangeSet":
        """Read a range file; errors name the file, line and field."""
        p = Path(path)
        doc, text = load_toml(p, "range file")
        return cls._from_doc(doc, text, str(p))

    @classmethod
    def from_toml_text(cls, text: str, where: str = "ranges") -> "RangeSet":
        """Parse range-file text (see :meth:`from_toml`)."""
        return cls._from_doc(loads_toml(text, where, "range file"), text, where)

    @classmethod
    def _from_doc(cls, doc: dict, text: str, where: str) -> "RangeSet":
        """Check and build the ranges of a parsed range file (``text``: its source, for line numbers)."""
        for key in doc:
            if key not in ("format", "metals", "range"):
                raise InputError(f"{where} line {_key_line(text, key, 0, None)}: unknown top-level field "
                                 f"'{clean_text(key)}' (expected format, metals and [[range]] tables)")
        fmt = doc.get("format", 1)
        if isinstance(fmt, bool) or fmt != 1:
            raise InputError(f"{where}: unsupported 'format' {short_repr(fmt)}; this version reads format 1")
        metals = doc.get("metals", [])
        if not isinstance(metals, list) or not all(isinstance(m, str) for m in metals):
            raise InputError(f"{where}: 'metals' must be a list of element symbols, got {short_repr(metals)}")
        for m in metals:
            try:
                ok = list(parse_formula(m).items()) == [(m, 1)]
            except InputError:
                ok = False
            if not ok:
                raise InputError(f"{where}: 'metals' entry {short_repr(m)} is not an element symbol")
        items = doc.get("range", [])
        if not isinstance(items, list) or not all(isinstance(item, dict) for item in items):
            raise InputError(f"{where}: 'range' must be an array of tables written [[range]]")
        if not items:
            raise InputError(f"{where}: no [[range]] tables found")
        headers = [i + 1 for i, ln in enumerate(text.splitlines()) if re.match(r"\s*\[\[\s*range\s*\]\]", ln)]
        ranges, locs = [], []
        for k, item in enumerate(items):
            hline = headers[k] if k < len(headers) else None
            nxt = headers[k + 1] if k + 1 < len(headers) else None
            loc = f"{where} line {hline} (range {k + 1})" if hline else f"{where} (range {k + 1})"
            for key in item:
                if key not in ("formula", "charge", "low", "high", "shares"):
                    ln = _key_line(text, key, hline, nxt) or hline
                    raise InputError(f"{where} line {ln} (range {k + 1}): unknown field '{clean_text(key)}' "
                                     "(expected formula, charge, low, high, shares)")
            for key in ("formula", "charge", "low", "high"):
                if key not in item:
                    raise InputError(f"{loc}: missing field '{key}'")
            shares = item.get("shares", {})
            if not isinstance(shares, dict):
                raise InputError(f"{loc}: 'shares' must be a table such as {{ \"Zn+\" = 0.9 }}, "
                                 f"got {short_repr(shares)}")
            ranges.append(_check_range_fields(item["low"], item["high"], item["formula"], item["charge"],
                                              shares, loc))
            locs.append(f"{where} line {hline}" if hline else f"{where} range {k + 1}")
        order = sorted(range(len(ranges)), key=lambda i: (ranges[i].low_da, ranges[i].high_da))
        _check_overlaps([ranges[i] for i in order], lambda i: locs[order[i]])
        return cls(tuple(ranges), tuple(metals), where)


def _fmt(x: float) -> str:
    """A float for TOML, short but exact enough (0.1 mDa)."""
    s = f"{x:.5f}".rstrip("0")
    return s + "0" if s.endswith(".") else s


def _key_line(text, key, start, stop):
    """1-based line of ``key =`` between header lines start and stop (None: anywhere)."""
    pat = re.compile(rf"\s*\"?{re.escape(key)}\"?\s*=")
    for i, ln in enumerate(text.splitlines()):
        n = i + 1
        if start and n <= start:
            continue
        if stop and n >= stop:
            break
        if pat.match(ln):
            return n
    return start
