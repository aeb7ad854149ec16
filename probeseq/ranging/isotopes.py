"""Chemical formulas and isotope patterns of atomic and molecular ions.

Isotope masses and natural abundances come from ``periodictable`` (version 2 or later: masses
from the 2020 Atomic Mass Evaluation, abundances the midpoints of the CIAAW-2021 ranges); no
isotope value is typed into this module.

Mass-to-charge convention
-------------------------
The mass-to-charge of an ion is its **neutral** mass divided by its charge state,
``m/z = M / n``, i.e. the mass of the removed electrons is neglected. Removing them shifts every
ion by the same amount, ``(M - n m_e) / n = M / n - m_e`` (``m_e`` = 0.000549 Da), whatever its
charge, so the choice is absorbed by the constant term of any mass calibration; the neutral
convention matches common reference tables. ``remove_electrons=True`` gives the other one.

Ion notation
------------
A formula is element symbols each followed by an optional count, with optional parenthesised
groups: ``Zn``, ``NiO``, ``CoOH``, ``C2H2``, ``H2O``, ``Co(OH)2``. An *ion* is written as the
formula followed by one ``+`` per charge: ``Zn+``, ``Zn++`` (Zn at 2+), ``C2+`` (C2 at 1+),
``C++`` (C at 2+), so the label is never ambiguous. A formula without ``+`` means charge 1.

Bounds: a formula has at most :data:`MAX_FORMULA_CHARS` characters and :data:`MAX_FORMULA_ATOMS`
atoms in all (field-evaporated molecular ions hold a few atoms; the bound keeps the isotope
enumeration small), and an ion at most :data:`MAX_CHARGE` charges.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from ..exceptions import InputError

__all__ = ['ELECTRON_MASS_DA', 'MAX_FORMULA_ATOMS', 'MAX_FORMULA_CHARS', 'MAX_CHARGE', 'IsotopePattern', 'parse_formula', 'canonical_formula', 'parse_ion', 'check_metals', 'ion_label', 'element_isotopes', 'isotope_pattern', 'metal_atoms']

_TOKEN = re.compile(r"([A-Z][a-z]?)(\d*)|(\()|(\))(\d*)")


#: most atoms in one formula (all elements together)
MAX_FORMULA_ATOMS = 64


#: longest formula text, characters
MAX_FORMULA_CHARS = 200


#: highest charge state of an ion
MAX_CHARGE = 8


def _electron_mass() -> float:
    import periodictable.constants as c

    return float(c.electron_mass)


#: electron mass in Da (from ``periodictable.constants``)
ELECTRON_MASS_DA = _electron_mass()


def parse_formula(formula: str) -> dict:
    """Atoms of a chemical formula.

    Parameters
    ----------
    formula : str
        Element symbols with optional counts and parenthesised groups, e.g. ``"CoOH"``,
        ``"C2H2"``, ``"Co(OH)2"``.

    Returns
    -------
    dict of str -> int
        Element symbol -> number of atoms, in order of first appearance.

    Raises
    ------
    InputError
        Malformed formula or unknown element (one-line message naming the formula).
    """
    if not isinstance(formula, str) or not formula.strip():
        raise InputError(f"formula must be a non-empty string of element symbols such as 'CoOH', "
                         f"got {_show(formula)}")
    text = formula.strip()
    if len(text) > MAX_FORMULA_CHARS:
        raise InputError(f"formula {_show(text)}: {len(text)} characters, more than {MAX_FORMULA_CHARS}")
    shown = _show(text)
    stack = [{}]
    pos = 0
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if m is None:
            raise InputError(
                f"formula {shown}: unexpected {_show(text[pos])} at character {pos + 1}; expected element "
                "symbols with counts, e.g. 'CoOH' or 'C2H2'")
        sym, count, opening, closing, gcount = m.groups()
        if sym is not None:
            n = _count(count, f"count of {sym}", shown)
            _check_element(sym, shown)
            stack[-1][sym] = stack[-1].get(sym, 0) + n
            _check_atoms(stack[-1], shown)
        elif opening:
            stack.append({})
        else:
            if len(stack) == 1:
                raise InputError(f"formula {shown}: ')' at character {pos + 1} without a matching '('")
            n = _count(gcount, "group count", shown)
            group = stack.pop()
            if not group:
                raise InputError(f"formula {shown}: empty group '()'")
            for s, k in group.items():
                stack[-1][s] = stack[-1].get(s, 0) + k * n
            _check_atoms(stack[-1], shown)
        pos = m.end()
    if len(stack) != 1:
        raise InputError(f"formula {shown}: '(' without a matching ')'")
    return stack[0]


def _show(value) -> str:
    """A formula or character quoted for a one-line message (non-printables escaped, cut short)."""
    text = repr(value) if not isinstance(value, str) else "'" + value + "'"
    text = "".join(c if c.isprintable() else c.encode("unicode_escape", "backslashreplace").decode("ascii")
                   for c in text[:61])
    return text if len(text) <= 60 else text[:57] + "..."


def _count(digits: str, what: str, shown: str) -> int:
    """A count written in a formula (1 when absent), bounded by MAX_FORMULA_ATOMS."""
    if not digits:
        return 1
    if len(digits) > 4 or int(digits) > MAX_FORMULA_ATOMS:
        raise InputError(f"formula {shown}: {what} {digits[:12]}{'...' if len(digits) > 12 else ''} is more than "
                         f"{MAX_FORMULA_ATOMS} atoms (an ion holds at most {MAX_FORMULA_ATOMS} atoms)")
    n = int(digits)
    if n < 1:
        raise InputError(f"formula {shown}: {what} must be >= 1, got {digits}")
    return n


def _check_atoms(atoms: dict, shown: str) -> None:
    total = sum(atoms.values())
    if total > MAX_FORMULA_ATOMS:
        raise InputError(f"formula {shown}: {total} atoms, more than the {MAX_FORMULA_ATOMS} an ion may hold")


def _check_element(sym: str, shown: str) -> None:
    """Raise unless ``sym`` is an element with natural isotopes (``shown``: the quoted formula)."""
    import periodictable as pt

    try:
        el = pt.elements.symbol(sym)
    except ValueError:
        raise InputError(f"formula {shown}: unknown element '{sym}'") from None
    if getattr(el, "isotope", None) is not None:  # D and T are isotopes, not elements
        raise InputError(f"formula {shown}: '{sym}' is an isotope symbol; use the element symbol")
    if el.number == 0 or not any(iso.abundance > 0 for iso in el):
        raise InputError(f"formula {shown}: element '{sym}' has no naturally occurring isotopes")


def _element_problem(sym: str) -> str | None:
    """Why ``sym`` is not an element with natural isotopes, or None when it is one."""
    try:
        _check_element(sym, repr(sym))
    except InputError as e:
        return str(e).split(": ", 1)[1]
    return None


def check_metals(symbols, what: str = "metals") -> tuple:
    """Metal symbols checked before any file is read: known elements with natural isotopes.

    Parameters
    ----------
    symbols : sequence of str
        Element symbols as given, e.g. ``("Co", "Zn")``.
    what : str
        How the caller names them in a message (``"--metals"``, ``"run.toml [run] metals"``).

    Returns
    -------
    tuple of str

    Raises
    ------
    InputError
        One line: symbols in the wrong case with the right spelling (``co,zn``: did you mean
        ``Co,Zn``?), an unknown symbol, an isotope symbol, an element without natural isotopes,
        or a metal given twice.
    """
    symbols = tuple(str(s).strip() for s in symbols)
    given = ",".join(symbols)
    given = given if len(given) <= 60 else given[:57] + "..."
    fixed, problems = [], []
    for sym in symbols:
        why = _element_problem(sym) if re.fullmatch(r"[A-Za-z]{1,3}", sym) else "unknown element"
        if why is not None and why.startswith("unknown element"):
            why = f"'{sym[:20]}' is not an element symbol"
        proper = sym[:1].upper() + sym[1:].lower()
        if why is not None and proper != sym and _element_problem(proper) is None:
            fixed.append(proper)
            problems.append(None)
        else:
            fixed.append(sym)
            problems.append(why)
    bad = [p for p in problems if p is not None]
    if bad:
        hint = "; give element symbols, e.g. Co,Zn" if "not an element symbol" in bad[0] else ""
        raise InputError(f"{what} {given}: {bad[0]}{hint}")
    wrong = [s for s, f in zip(symbols, fixed) if s != f]
    if wrong:
        hint = f"did you mean {','.join(fixed)}?" if len(set(fixed)) == len(fixed) else "e.g. Co,Zn"
        raise InputError(f"{what} {given}: '{wrong[0]}' is not an element symbol (symbols are case-sensitive); {hint}")
    twice = sorted({s for s in symbols if symbols.count(s) > 1})
    if twice:
        raise InputError(f"{what} {given}: {', '.join(twice)} is listed twice; list each metal once")
    return symbols


def canonical_formula(formula: str) -> str:
    """The formula written back from its atoms, elements in order of first appearance.

    Parameters
    ----------
    formula : str

    Returns
    -------
    str
        E.g. ``'Co(OH)2'`` -> ``'CoO2H2'``, ``'CoOH'`` -> ``'CoOH'``.
    """
    atoms = parse_formula(formula)
    return "".join(s if n == 1 else f"{s}{n}" for s, n in atoms.items())


def parse_ion(text: str) -> tuple:
    """Parse an ion written as formula plus one ``+`` per charge (``'Zn++'``, ``'CoO+'``, ``'H2O'``).

    Returns
    -------
    (formula, charge) : (str, int)
        Canonical formula and charge state (1 when no ``+`` is given).
    """
    if not isinstance(text, str) or not text.strip():
        raise InputError(f"ion must be a formula followed by one '+' per charge (e.g. 'Zn++'), got {_show(text)}")
    t = text.strip()
    if len(t) > MAX_FORMULA_CHARS + MAX_CHARGE:
        raise InputError(f"ion {_show(t)}: {len(t)} characters, more than {MAX_FORMULA_CHARS + MAX_CHARGE}")
    body = t.rstrip("+")
    charge = len(t) - len(body) or 1
    if "+" in body or "-" in body:
        raise InputError(f"ion {_show(text)}: write the charge as one '+' per charge at the end "
                         "(e.g. 'Zn++' for Zn 2+)")
    if charge > MAX_CHARGE:
        raise InputError(f"ion {_show(t)}: charge {charge} is more than {MAX_CHARGE}")
    return canonical_formula(body), charge


def ion_label(formula: str, charge: int) -> str:
    """Text label of an ion: formula then one ``+`` per charge (``ion_label('Zn', 2) == 'Zn++'``)."""
    return f"{formula}{'+' * int(charge)}"


@lru_cache(maxsize=None)
def element_isotopes(symbol: str) -> tuple:
    """Natural isotopes of an element from ``periodictable``.

    Parameters
    ----------
    symbol : str
        Element symbol.

    Returns
    -------
    mass_numbers : (k,) ndarray of int
    masses_da : (k,) ndarray of float, Da
        Atomic masses (AME2020).
    fractions : (k,) ndarray of float
        Natural abundances as fractions (CIAAW-2021 midpoints, renormalised by periodictable).
    """
    import periodictable as pt

    _check_element(symbol, _show(symbol))
    el = pt.elements.symbol(symbol)
    iso = [(i.isotope, float(i.mass), float(i.abundance) / 100.0) for i in el if i.abundance > 0]
    a = np.array([i[0] for i in iso], dtype=np.int64)
    m = np.array([i[1] for i in iso], dtype=np.float64)
    f = np.array([i[2] for i in iso], dtype=np.float64)
    for arr in (a, m, f):
        arr.flags.writeable = False
    return a, m, f


@dataclass(frozen=True)
class IsotopePattern:
    """The isotope lines of an ion.

    Attributes
    ----------
    formula : str
        Canonical formula.
    charge : int
        Charge state.
    mass_to_charge_da : (n_lines,) ndarray of float, Da
        Line positions, ascending (neutral mass / charge unless electrons were removed).
    fractions : (n_lines,) ndarray of float
        Share of the ion's natural isotopic composition in each line (sums to just under 1 after
        pruning; not renormalised).
    labels : tuple of str
        Most abundant isotopologue of each line, e.g. ``'64Zn 16O'``, ``'12C2 1H2'``.
    """

    formula: str
    charge: int
    mass_to_charge_da: np.ndarray
    fractions: np.ndarray
    labels: tuple

    @property
    def label(self) -> str:
        """Ion label (formula then one '+' per charge)."""
        return ion_label(self.formula, self.charge)

    @property
    def n_lines(self) -> int:
        return int(self.mass_to_charge_da.size)

    @property
    def strongest_da(self) -> float:
        """Position of the most abundant line, Da."""
        return float(self.mass_to_charge_da[int(np.argmax(self.fractions))])


def _merge(masses, probs, labels, merge_da):
    """Sort lines by mass and merge runs of lines closer than ``merge_da``."""
    order = np.argsort(masses, kind="stable")
    masses, probs = masses[order], probs[order]
    labels = [labels[i] for i in order]
    new_group = np.concatenate([[True], np.diff(masses) > merge_da])
    gid = np.cumsum(new_group) - 1
    p = np.bincount(gid, probs)
    m = np.bincount(gid, probs * masses) / p
    lab = []
    starts = np.flatnonzero(new_group)
    ends = np.append(starts[1:], masses.size)
    for s, e in zip(starts, ends):
        lab.append(labels[s + int(np.argmax(probs[s:e]))])
    return m, p, lab


def isotope_pattern(formula: str, charge: int = 1, *, min_fraction: float = 1e-4, merge_da: float = 1e-3,
                    remove_electrons: bool = False) -> IsotopePattern:
    """Isotope pattern of an ion by convolving the natural patterns of its atoms.

    Parameters
    ----------
    formula : str
        Chemical formula (see :func:`parse_formula`).
    charge : int
        Charge state, >= 1.
    min_fraction : float
        Lines below this fraction of the strongest line are pruned (relative abundance).
    merge_da : float, Da
        Lines of the neutral molecule closer than this are merged (abundance-weighted mean mass).
    remove_electrons : bool
        Subtract ``charge`` electron masses before dividing by the charge (see module notes).

    Returns
    -------
    IsotopePattern

    Examples
    --------
    >>> p = isotope_pattern("Co", 2)
    >>> round(float(p.mass_to_charge_da[0]), 4)
    29.4666
    """
    if isinstance(charge, bool) or not isinstance(charge, (int, np.integer)) or not 1 <= charge <= MAX_CHARGE:
        raise InputError(f"charge of {_show(formula)} must be an integer from 1 to {MAX_CHARGE}, got {_show(charge)}")
    if not 0 <= min_fraction < 1:
        raise InputError(f"min_fraction must be in [0, 1), got {min_fraction}")
    if not isinstance(formula, str):
        raise InputError(f"formula must be a string of element symbols such as 'CoOH', got {formula!r}")
    return _pattern(formula, int(charge), float(min_fraction), float(merge_da), bool(remove_electrons))


@lru_cache(maxsize=4096)
def _pattern(formula, charge, min_fraction, merge_da, remove_electrons) -> IsotopePattern:
    atoms = parse_formula(formula)
    masses = np.zeros(1)
    probs = np.ones(1)
    labels = [""]
    inner_cut = min_fraction * 1e-2  # keep a margin while building, prune exactly at the end
    for sym, n in atoms.items():
        a, m_iso, f_iso = element_isotopes(sym)
        for _ in range(n):
            masses = (masses[:, None] + m_iso[None, :]).ravel()
            probs = (probs[:, None] * f_iso[None, :]).ravel()
            labels = [lab + f"{ai}{sym}" for lab in labels for ai in a]
            masses, probs, labels = _merge(masses, probs, labels, merge_da)
            keep = probs >= inner_cut * probs.max()
            masses, probs = masses[keep], probs[keep]
            labels = [lab for lab, k in zip(labels, keep) if k]
    keep = probs >= min_fraction * probs.max()
    masses, probs = masses[keep], probs[keep]
    labels = tuple(_compact_label(lab) for lab, k in zip(labels, keep) if k)
    if remove_electrons:
        masses = masses - int(charge) * ELECTRON_MASS_DA
    mz = masses / int(charge)
    mz.flags.writeable = False
    probs.flags.writeable = False
    return IsotopePattern(canonical_formula(formula), int(charge), mz, probs, labels)


def _compact_label(label: str) -> str:
    """Compact repeated isotopes and separate them by spaces: '16O1H1H' -> '16O 1H2'."""
    parts = re.findall(r"(\d+)([A-Z][a-z]?)", label)
    out = []
    for iso in parts:
        if out and out[-1][0] == iso:
            out[-1][1] += 1
        else:
            out.append([iso, 1])
    return " ".join(f"{a}{s}" + (str(k) if k > 1 else "") for (a, s), k in out)


def metal_atoms(formula: str, metals) -> np.ndarray:
    """Number of atoms of each listed metal in a formula.

    Parameters
    ----------
    formula : str
    metals : sequence of str
        Metal symbols in channel order.

    Returns
    -------
    (n_metals,) ndarray of int
        E.g. ``metal_atoms('ZnO', ['Co', 'Zn']) -> [0, 1]``.
    """
    atoms = parse_formula(formula)
    return np.array([atoms.get(m, 0) for m in metals], dtype=np.int64)
