"""Isotope data, formula parsing and isotope patterns against published values."""

import numpy as np
import periodictable as pt
import pytest

from probeseq import InputError
from probeseq.ranging.calibration import DEFAULT_FRAGMENTS, METAL_ION_TEMPLATES
from probeseq.ranging.isotopes import (
    ELECTRON_MASS_DA,
    canonical_formula,
    element_isotopes,
    ion_label,
    isotope_pattern,
    metal_atoms,
    parse_formula,
    parse_ion,
)

METALS = ("Co", "Zn", "Ni", "Fe", "Cu", "Mn")


def _elements_used():
    els = set(METALS)
    for f, _ in DEFAULT_FRAGMENTS:
        els |= set(parse_formula(f))
    for t, _ in METAL_ION_TEMPLATES:
        els |= set(parse_formula(t.format(M="Co")))
    return sorted(els)


@pytest.mark.parametrize("symbol", _elements_used())
def test_isotopes_equal_periodictable_table(symbol):
    # source: periodictable 2.x isotope table (AME2020 masses, CIAAW-2021 abundance midpoints),
    # every natural isotope of every element the default predictions use
    a, m, f = element_isotopes(symbol)
    ref = [(i.isotope, i.mass, i.abundance / 100) for i in pt.elements.symbol(symbol) if i.abundance > 0]
    assert a.tolist() == [r[0] for r in ref]
    np.testing.assert_allclose(m, [r[1] for r in ref], rtol=0, atol=1e-12)
    np.testing.assert_allclose(f, [r[2] for r in ref], rtol=0, atol=1e-12)
    assert abs(f.sum() - 1) < 1e-6


def test_table_is_the_2020_evaluation():
    # source: AME2020 masses (Wang et al. 2021, Chin. Phys. C 45, 030003) as carried by
    # periodictable 2.1: 59Co 58.933193524 u, 63Cu 62.929597119 u, 16O 15.99491461926 u;
    # CIAAW-2021 abundance midpoints: 63Cu/65Cu 69.15/30.85 %, 58Ni 68.0769 %,
    # Zn 64/66/67/68/70 = 49.17/27.73/4.04/18.45/0.61 %. The older NIST table (periodictable 1.x)
    # has 63Cu at 62.9296011 u and 69.17 %, so this test fails on it.
    a, m, f = element_isotopes("Co")
    assert abs(m[0] - 58.933193524) < 1e-6 and a.tolist() == [59] and f[0] == 1.0
    a, m, f = element_isotopes("Cu")
    assert abs(m[0] - 62.929597119) < 1e-6
    np.testing.assert_allclose(f, [0.6915, 0.3085], atol=1e-9)
    a, m, f = element_isotopes("O")
    assert abs(m[0] - 15.99491461926) < 1e-9
    a, m, f = element_isotopes("Ni")
    assert abs(f[0] - 0.680769) < 1e-9
    a, m, f = element_isotopes("Zn")
    assert a.tolist() == [64, 66, 67, 68, 70]
    np.testing.assert_allclose(f, [0.4917, 0.2773, 0.0404, 0.1845, 0.0061], atol=1e-9)


@pytest.mark.parametrize("formula, p_mid", [("Cl2", 0.758), ("Cu2", 0.6915)])
def test_diatomic_of_two_isotope_element_is_binomial(formula, p_mid):
    # source: textbook binomial pattern of a diatomic X2 of a two-isotope element: lines at
    # 2 m1, m1 + m2, 2 m2 with fractions p^2, 2pq, q^2. Abundances: Cl 35/37 = 0.758/0.242
    # (CIAAW-2021 interval midpoints, recalled from memory: 35Cl in [0.755, 0.761]);
    # Cu 63/65 = 0.6915/0.3085 (CIAAW-2021 midpoints as in periodictable 2.1).
    el = formula[:-1]
    _, m, _ = element_isotopes(el)
    p, q = p_mid, 1 - p_mid
    pat = isotope_pattern(formula, 1)
    assert pat.n_lines == 3
    np.testing.assert_allclose(pat.fractions, [p * p, 2 * p * q, q * q], atol=1e-9)
    np.testing.assert_allclose(pat.mass_to_charge_da, [2 * m[0], m[0] + m[1], 2 * m[1]], atol=1e-9)


def test_chlorine_dimer_shows_textbook_9_6_1_ratio():
    # source: the familiar M : M+2 : M+4 = 9 : 6 : 1 pattern of Cl2 in mass-spectrometry
    # textbooks (from 35Cl : 37Cl ~ 3 : 1; recalled from memory)
    f = isotope_pattern("Cl2").fractions
    ratio = f / f[-1]
    assert abs(ratio[0] / 9 - 1) < 0.12 and abs(ratio[1] / 6 - 1) < 0.12


@pytest.mark.parametrize("formula, charge, line, expected", [
    ("Co", 2, 0, 29.4666),   # 59Co 2+
    ("Co", 3, 0, 19.6444),   # 59Co 3+
    ("Cu", 2, 0, 31.4648),   # 63Cu 2+
    ("CoO", 1, 0, 74.9281),  # 59Co16O +
    ("CuO", 1, 0, 78.9245),  # 63Cu16O +
])
def test_named_ions_mass_to_charge(formula, charge, line, expected):
    # source: m/z = neutral mass / n computed from periodictable 2.1 (AME2020 masses) with the
    # package alone, outside probeseq, to 4 decimals
    pat = isotope_pattern(formula, charge)
    assert abs(pat.mass_to_charge_da[line] - expected) < 1e-4


def test_electron_convention_is_a_constant_shift():
    # source: periodictable 2.1 ion masses (Isotope.ion[n].mass removes n electrons)
    for charge in (1, 2, 3):
        neutral = isotope_pattern("Co", charge).mass_to_charge_da[0]
        ion = isotope_pattern("Co", charge, remove_electrons=True).mass_to_charge_da[0]
        assert abs(ion - pt.Co[59].ion[charge].mass / charge) < 1e-9
        assert abs((neutral - ion) - ELECTRON_MASS_DA) < 1e-12
    assert abs(ELECTRON_MASS_DA - 5.48579909e-4) < 1e-12  # CODATA electron mass in u (recalled from memory)


@pytest.mark.parametrize("formula", ["Zn", "ZnO", "CoOH", "C2H2", "H2O", "NiO", "Co(OH)2"])
def test_pattern_mean_mass_matches_standard_atomic_weight(formula):
    # source: periodictable 2.1 formula mass (IUPAC-2021 abridged standard atomic weights); the
    # abundance-weighted mean of the pattern agrees to the rounding of the abridged weights
    pat = isotope_pattern(formula)
    mean = np.sum(pat.fractions * pat.mass_to_charge_da) / pat.fractions.sum()
    assert abs(mean - pt.formula(formula).mass) < 0.01
    assert pat.fractions.sum() > 1 - 1e-3


def test_charge_divides_positions():
    one, two = isotope_pattern("ZnO", 1), isotope_pattern("ZnO", 2)
    np.testing.assert_allclose(two.mass_to_charge_da, one.mass_to_charge_da / 2, rtol=1e-14)
    np.testing.assert_array_equal(two.fractions, one.fractions)


def test_pruning_and_merging():
    full = isotope_pattern("C2H2", min_fraction=0.0, merge_da=1e-6)
    pruned = isotope_pattern("C2H2", min_fraction=1e-3)
    assert (pruned.fractions >= 1e-3 * pruned.fractions.max()).all()
    assert pruned.n_lines < full.n_lines
    assert abs(full.fractions.sum() - 1) < 1e-12
    # 12C13C1H2 (27.0190) and 12C2 2H 1H (27.0219) are 2.9 mDa apart: merged at 5 mDa, abundance kept
    merged = isotope_pattern("C2H2", min_fraction=0.0, merge_da=5e-3)
    assert merged.n_lines < full.n_lines
    assert np.diff(merged.mass_to_charge_da).min() > 5e-3
    assert abs(merged.fractions.sum() - 1) < 1e-12
    f27 = np.abs(full.mass_to_charge_da - 27.02) < 0.01
    assert f27.sum() == 2
    near27 = np.flatnonzero(np.abs(merged.mass_to_charge_da - 27.02) < 0.01)
    assert near27.size == 1
    i = int(near27[0])
    assert abs(merged.fractions[i] - full.fractions[f27].sum()) < 1e-12
    mean = np.average(full.mass_to_charge_da[f27], weights=full.fractions[f27])
    assert abs(merged.mass_to_charge_da[i] - mean) < 1e-9
    assert merged.labels[i] == "12C 13C 1H2"


def test_parse_formula_and_ions():
    assert parse_formula("CoOH") == {"Co": 1, "O": 1, "H": 1}
    assert parse_formula("C2H2") == {"C": 2, "H": 2}
    assert parse_formula("Co(OH)2") == {"Co": 1, "O": 2, "H": 2}
    assert canonical_formula("Co(OH)2") == "CoO2H2"
    assert parse_ion("Zn++") == ("Zn", 2)
    assert parse_ion("C2+") == ("C2", 1)
    assert parse_ion("C++") == ("C", 2)
    assert parse_ion("H2O") == ("H2O", 1)
    assert ion_label("Zn", 3) == "Zn+++"
    assert metal_atoms("ZnO", ["Co", "Zn"]).tolist() == [0, 1]
    assert metal_atoms("Co2O", ["Co", "Zn"]).tolist() == [2, 0]


@pytest.mark.parametrize("bad, words", [
    ("Xx", ["'Xx'", "unknown element"]),
    ("co", ["'co'", "character 1"]),
    ("Zn-", ["'Zn-'", "'-'"]),
    ("", ["non-empty"]),
    ("2Zn", ["'2Zn'"]),
    ("Zn0", ["count of Zn"]),
    ("Tc", ["'Tc'", "no naturally occurring"]),
    ("D2O", ["'D'", "isotope"]),
    ("Co(OH", ["'('"]),
    ("Co)", ["')'"]),
])
def test_bad_formulas_raise_one_line(bad, words):
    with pytest.raises(InputError) as e:
        isotope_pattern(bad)
    msg = str(e.value)
    assert "\n" not in msg
    for w in words:
        assert w in msg


@pytest.mark.parametrize("bad", ["Zn+-", "Z+", "Zn+2"])
def test_bad_ion_notation(bad):
    with pytest.raises(InputError):
        parse_ion(bad)


def test_bad_charge():
    for charge in (0, -1, 1.5, True):
        with pytest.raises(InputError, match="charge"):
            isotope_pattern("Zn", charge)
