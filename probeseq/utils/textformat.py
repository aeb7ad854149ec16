"""Numbers as text, the same way in every place that prints them (terminal, report, tables).

* **p-values at the resolution of their test.** A p-value from ``B`` resamples or null draws,
  ``(1 + #{as extreme}) / (1 + B)`` (twice that, two-sided), cannot be smaller than ``1 / (B + 1)``
  (``2 / (B + 1)`` two-sided). At that floor it is printed as ``"≤ 0.005"`` (the floor rounded up
  to two significant figures, so the statement stays true), never as a number with more digits
  than the test has; above it with as many decimals as ``B`` resolves. An analytic p-value (a
  chi-square or normal tail) is printed down to ``1e-300``, below which double precision
  underflows, as ``"< 1e-300"``.
* **Intervals as "low to high"**, which stays readable when a bound is negative
  (``"-0.02 to -0.01"``, never ``"-0.02--0.01"``).
* **Ions and powers of ten in figures as plain Unicode text** (``"C₂H₂⁺"``, ``"10⁻³"``), not
  matplotlib mathtext: every mathtext string is parsed once per figure format and size, about
  13 ms each, which was a sixth of the figures' time (measured on a 10^7-ion run's figures).
"""

from __future__ import annotations

import math
import re

__all__ = ['ANALYTIC_P_FLOOR', 'p_floor', 'format_p', 'p_phrase', 'format_interval', 'superscript',
           'subscript', 'typeset_ion', 'plain_log_ticks']

#: analytic p-values below this are printed as "< 1e-300" (double precision underflows near here)
ANALYTIC_P_FLOOR = 1e-300


def _finite(x) -> bool:
    try:
        return x is not None and not isinstance(x, bool) and math.isfinite(float(x))
    except (TypeError, ValueError):
        return False


def p_floor(n_draws: int, two_sided: bool = False) -> float:
    """The smallest p-value ``n_draws`` resamples or null draws can give (dimensionless).

    Parameters
    ----------
    n_draws : int
        Resamples or null draws the p-value was computed from (``B``).
    two_sided : bool
        The p-value is ``2 min(P(d <= 0), P(d >= 0))`` (floor ``2 / (B + 1)``) rather than one
        tail (floor ``1 / (B + 1)``).
    """
    return (2.0 if two_sided else 1.0) / (int(n_draws) + 1)


def _round_up(x: float, digits: int = 2) -> str:
    """``x`` rounded up to ``digits`` significant figures, as text (``0.00995 -> '0.01'``)."""
    step = 10.0 ** (math.floor(math.log10(x)) - digits + 1)
    v = math.ceil(x / step - 1e-9) * step
    return f"{v:.{digits}g}"


def format_p(p, n_draws: int | None = None, *, two_sided: bool = False, missing: str = "n/a") -> str:
    """A p-value as text, at the resolution of the test that gave it.

    Parameters
    ----------
    p : float or None
        The p-value (dimensionless, in [0, 1]).
    n_draws : int, optional
        Resamples or null draws of a resampling test; None for an analytic p-value.
    two_sided : bool
        The resampling p-value doubles the smaller tail (see :func:`p_floor`).
    missing : str
        Text for a missing or non-finite p-value.

    Returns
    -------
    str
        ``"≤ 0.005"`` at the floor of a resampling test (none of its draws was as extreme),
        ``"0.140"`` above it (as many decimals as ``n_draws`` resolves, at least two), and for an
        analytic p-value ``"0.032"``, ``"3.1e-07"`` or ``"< 1e-300"``.

    Examples
    --------
    >>> format_p(1 / 200, 199), format_p(2 / 201, 200, two_sided=True), format_p(0.14, 199)
    ('≤ 0.005', '≤ 0.01', '0.140')
    >>> format_p(0.0), format_p(3.1e-7)
    ('< 1e-300', '3.1e-07')
    """
    if not _finite(p):
        return missing
    p = min(max(float(p), 0.0), 1.0)
    if n_draws is not None and int(n_draws) >= 1:
        floor = p_floor(n_draws, two_sided)
        if p <= floor * (1 + 1e-9):
            return "\u2264 " + _round_up(floor)
        decimals = max(2, math.ceil(math.log10(int(n_draws) + 1)))
        return f"{p:.{decimals}f}"
    if p < ANALYTIC_P_FLOOR:
        return "< 1e-300"
    return f"{p:.1e}" if p < 0.001 else f"{p:.3f}"


def p_phrase(p, n_draws: int | None = None, *, two_sided: bool = False) -> str:
    """``"p = 0.140"``, ``"p ≤ 0.005"`` or ``"p < 1e-300"``: :func:`format_p` in a sentence."""
    t = format_p(p, n_draws, two_sided=two_sided)
    return f"p {t}" if t[0] in "<\u2264" else f"p = {t}"


def format_interval(low, high, fmt=None, missing: str = "n/a") -> str:
    """An interval as ``"low to high"`` (``"-0.02 to -0.01"``); ``missing`` when a bound is missing.

    Parameters
    ----------
    low, high : float or None
        The bounds, in the unit of the quantity.
    fmt : callable, optional
        Number -> text (default: three significant figures).
    missing : str
        Text when either bound is missing or not finite.
    """
    if not (_finite(low) and _finite(high)):
        return missing
    f = fmt or (lambda v: f"{float(v):.3g}")
    return f"{f(low)} to {f(high)}"


_SUP = str.maketrans("0123456789+-=()n", "\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079"
                                       "\u207a\u207b\u207c\u207d\u207e\u207f")
_SUB = str.maketrans("0123456789+-=()", "\u2080\u2081\u2082\u2083\u2084\u2085\u2086\u2087\u2088\u2089"
                                       "\u208a\u208b\u208c\u208d\u208e")


def superscript(text: str) -> str:
    """Digits, signs and brackets as Unicode superscripts: ``"-3" -> "⁻³"``, ``"2+" -> "²⁺"``
    (other characters are kept as they are)."""
    return str(text).translate(_SUP)


def subscript(text: str) -> str:
    """Digits, signs and brackets as Unicode subscripts: ``"2" -> "₂"``."""
    return str(text).translate(_SUB)


def typeset_ion(formula: str, charge: int) -> str:
    """An ion as typeset plain text for figures: ``("C2H2", 1) -> "C₂H₂⁺"``, ``("Zn", 2) -> "Zn²⁺"``
    (the label in files and messages is ``probeseq.ranging.isotopes.ion_label``, ``"Zn++"``).

    The counts of atoms in ``formula`` become subscripts and the charge state a superscript
    (``+`` for a single charge, ``2+`` for a double one, as chemists write it).
    """
    body = re.sub(r"\d+", lambda m: subscript(m.group(0)), str(formula))
    return body + superscript("+" if int(charge) == 1 else f"{int(charge)}+")


_MATH_POWER = re.compile(r"^\$\\mathdefault\{(?:(?P<m>[-\d.]+)\\times\s*)?(?P<b>\d+)\^\{(?P<e>[-\d]+)\}\}\$$")
_MATH_PLAIN = re.compile(r"^\$\\mathdefault\{(?P<t>[^${}\\]*)\}\$$")


def _plain_tick(label: str) -> str:
    """A log-axis tick label of matplotlib's scientific formatter as plain text
    (``"$\\mathdefault{10^{-3}}$" -> "10⁻³"``, ``"$\\mathdefault{2\\times10^{1}}$" -> "2×10¹"``);
    a label of another form is returned unchanged."""
    m = _MATH_POWER.match(label)
    if m:
        lead = f"{m.group('m')}\u00d7" if m.group("m") else ""
        return f"{lead}{m.group('b')}{superscript(m.group('e'))}"
    m = _MATH_PLAIN.match(label)
    return m.group("t") if m else label


def plain_log_ticks(axis) -> None:
    """Label the ticks of a logarithmic matplotlib axis (``ax.xaxis`` or ``ax.yaxis``, after
    ``set_xscale("log")``) as plain text (``10²``, ``2×10¹``) instead of mathtext: the same ticks
    and labels as matplotlib's default log formatter, written without the mathtext parser."""
    from matplotlib.ticker import LogFormatterSciNotation

    class _PlainLogFormatter(LogFormatterSciNotation):
        def __call__(self, x, pos=None):
            return _plain_tick(super().__call__(x, pos))

    major, minor = axis.get_major_formatter(), axis.get_minor_formatter()
    axis.set_major_formatter(_PlainLogFormatter(base=getattr(major, "_base", 10.0),
                                                labelOnlyBase=getattr(major, "labelOnlyBase", True)))
    axis.set_minor_formatter(_PlainLogFormatter(base=getattr(minor, "_base", 10.0),
                                                labelOnlyBase=getattr(minor, "labelOnlyBase", False)))
