"""Overlapping metal and fragment lines: isotope patterns of molecular ions, the spatial mixture
fit, and the joint refit of a run in which 24Mg+ sits under C2+ (docs/REFERENCES.md §1, §6)."""

import numpy as np
import periodictable as pt
import pytest

from probeseq.exceptions import DataQualityWarning
from probeseq.ranging.isotopes import isotope_pattern
from probeseq.ranging.spatial import mixture_share
from probeseq.simulation.simulate import simulate_run


def _pattern_from_periodictable(atoms: dict, charge: int):
    """Nominal-mass pattern of a molecule by convolving the elements' natural abundances taken
    from periodictable (the reference library the project's isotope tables cite)."""
    dist = {0: 1.0}
    for sym, n in atoms.items():
        el = pt.elements.symbol(sym)
        iso = {i.isotope: i.abundance / 100.0 for i in el if i.abundance > 0}
        for _ in range(n):
            new = {}
            for a, p in dist.items():
                for m, q in iso.items():
                    new[a + m] = new.get(a + m, 0.0) + p * q
            dist = new
    return {m / charge: p for m, p in dist.items()}


@pytest.mark.parametrize("formula,atoms,charge", [("C2", {"C": 2}, 1), ("C2H", {"C": 2, "H": 1}, 1),
                                                   ("MgO", {"Mg": 1, "O": 1}, 1), ("Cd", {"Cd": 1}, 2)])
def test_molecular_isotope_patterns_match_periodictable(formula, atoms, charge):
    want = _pattern_from_periodictable(atoms, charge)
    pat = isotope_pattern(formula, charge)
    got = {}  # lines of one nominal mass (13C 1H against 12C 2H, say) summed
    for pos, frac in zip(pat.mass_to_charge_da, pat.fractions):
        nominal = min(want, key=lambda m: abs(m - pos))
        assert abs(nominal - pos) < 0.1
        got[nominal] = got.get(nominal, 0.0) + frac
    for nominal, frac in got.items():
        assert frac == pytest.approx(want[nominal], abs=2e-3)
    assert sum(got.values()) == pytest.approx(1.0, abs=5e-3)


@pytest.mark.parametrize("w_true", [0.0, 0.1, 0.35, 0.8])
def test_mixture_share_recovers_known_mixtures(w_true):
    rng = np.random.default_rng(int(w_true * 100))
    g_m = np.array([0.30, 0.25, 0.18, 0.10, 0.07, 0.04, 0.03, 0.02, 0.01, 0.0, 0.0, 0.0, 0.0])
    g_f = np.full(13, 1.0 / 13)
    g_m = g_m / g_m.sum()
    h = rng.multinomial(4000, w_true * g_m + (1 - w_true) * g_f)
    w, se, lo, hi = mixture_share(h, g_m, g_f)
    assert abs(w - w_true) < 4 * se + 1e-3
    assert lo <= w_true <= hi or abs(w - w_true) < 1e-3
    if w_true == 0.0:
        assert lo == 0.0 and hi > 0.0  # an honest interval at the bound, not a zero error


def test_same_profiles_carry_no_information():
    g = np.full(13, 1.0 / 13)
    w, se, lo, hi = mixture_share(np.full(13, 100.0), g, g)
    assert se == np.inf and lo == 0.0 and hi == 1.0


def test_light_metal_under_carbon_fragments_is_recovered_and_flagged():
    """24Mg+ at 23.985 Da and C2+ at 24.000 Da are one peak at this resolving power, so the
    spectrum alone gives Mg+ nothing; the ions' distance to the rod axes splits them."""
    from probeseq.pipeline import AnalysisOptions, analyze

    run = simulate_run(metals=("Mg", "Co"), fragments="carbon-rich", organic_per_site=3.0, mrp=400,
                       depth_nm=24, top_radius_nm=6, seed=7, pattern="long-block")
    res = analyze(run.ions, ("Mg", "Co"), run.lattice, options=AnalysisOptions(seed=1))
    # the analysis records its DataQualityWarnings in the result (and results.json)
    assert any(w.startswith("Mg: its composition depends on how overlapped ranges") for w in res.warnings)
    truth = run.truth["composition_sites"]
    d = res.to_dict()
    assert abs(d["composition"]["Mg"] - truth["Mg"]) < 0.02
    spectrum_only = d["ranging"]["composition_spectrum_only"]["Mg"]
    assert spectrum_only < truth["Mg"] - 0.05  # what the spectrum alone gives
    iv = d["composition_interval"]["Mg"]
    assert iv["low"] <= truth["Mg"] <= iv["high"]
    at24 = [r for r in d["ranging"]["overlap_refinement"] if r["low_da"] < 24.0 < r["high_da"]]
    assert at24 and at24[0]["metal_share_space"] > 0.1 and at24[0]["metal_share_spectrum"] < 0.01
    assert any("Mg" in w and "24" in w for w in res.warnings)
    notes = res.ranging.to_toml()
    assert "distance to the rod axes" in notes
    # the figure of the refitted ranges: one panel per range, drawn without pyplot (nothing left open)
    import matplotlib.pyplot as plt

    from probeseq.ranging.plot import plot_overlaps

    figs = plt.get_fignums()
    fig = plot_overlaps(res.ranging)
    assert fig is not None and plt.get_fignums() == figs
    n_used = sum(1 for r in d["ranging"]["overlap_refinement"] if r.get("used"))
    assert sum(ax.get_visible() for ax in fig.axes) == min(6, n_used)


def test_a_metal_whose_every_line_overlaps_and_space_cannot_split_is_named():
    """Bad input of the trade: when every line of a metal sits in an overlapped range and the ions'
    distances cannot tell the species apart, the warning names the ranges, the species, and what
    would help."""
    from types import SimpleNamespace

    import warnings

    from probeseq.ranging.ranges import Range, RangeSet
    from probeseq.ranging.spatial import _warn_unseparated

    rs = RangeSet((Range(23.9, 24.3, "C2", 1), Range(24.9, 25.3, "C2H", 1), Range(29.4, 29.8, "Co", 2)),
                  ("Mg", "Co"))
    rr = SimpleNamespace(ranges=rs, metals=("Mg", "Co"), species=(("Mg", 1), ("C2", 1), ("C2H", 1), ("Co", 2)),
                         species_metal_atoms=np.array([[1, 0], [0, 0], [0, 0], [0, 1]]))
    A = np.array([[0.79, 0.98, 0.0, 0.0], [0.10, 0.02, 0.98, 0.0], [0.0, 0.0, 0.0, 0.95]])
    mixed = np.array([True, True, False])
    clean_m = np.array([False, False, True])
    with warnings.catch_warnings(record=True) as got:
        warnings.simplefilter("always")
        _warn_unseparated(rr, A, np.array([True, False, False, True]), mixed, clean_m, "no reason")
    msgs = [str(w.message) for w in got]
    assert len(msgs) == 1 and msgs[0].startswith("Mg: every line overlaps another species")
    assert "23.90-24.30 Da (Mg+, C2+)" in msgs[0] and "higher resolving power" in msgs[0]
    assert "--ranges" in msgs[0]


def test_a_metal_given_none_of_an_overlapped_range_is_named_when_space_cannot_check_it():
    """Mg has a clean line (MgO+ at 40 Da), but the spectrum gave it none of the 24 Da range it shares
    with C2+ (the fit's vertex): when space cannot check that split, the composition may miss the
    Mg+ ions and a warning says so; a metal whose overlapped range the fit did share (Co2+ with a
    fragment it put at 4 %) is not named."""
    from types import SimpleNamespace

    import warnings

    from probeseq.ranging.ranges import Range, RangeSet
    from probeseq.ranging.spatial import _warn_unseparated

    rs = RangeSet((Range(23.9, 24.3, "C2", 1), Range(39.8, 40.2, "MgO", 1), Range(29.4, 29.8, "Co", 2),
                   Range(58.7, 59.2, "Co", 1)), ("Mg", "Co"))
    rr = SimpleNamespace(ranges=rs, metals=("Mg", "Co"),
                         species=(("Mg", 1), ("MgO", 1), ("C2", 1), ("Co", 2), ("Co", 1), ("CO", 1)),
                         species_metal_atoms=np.array([[1, 0], [1, 0], [0, 0], [0, 1], [0, 1], [0, 0]]))
    A = np.array([[0.79, 0.0, 0.98, 0.0, 0.0, 0.0], [0.0, 0.70, 0.0, 0.0, 0.0, 0.0],
                  [0.0, 0.0, 0.0, 0.95, 0.0, 0.03], [0.0, 0.0, 0.0, 0.0, 0.95, 0.0]])
    is_metal = np.array([True, True, False, True, True, False])
    mixed = np.array([True, False, True, False])
    clean_m = np.array([False, True, False, True])
    w_fit = np.array([0.0, 1.0, 0.96, 1.0])
    with warnings.catch_warnings(record=True) as got:
        warnings.simplefilter("always")
        _warn_unseparated(rr, A, is_metal, mixed, clean_m, "no reason", w_fit)
    msgs = [str(w.message) for w in got]
    assert len(msgs) == 1 and msgs[0].startswith("Mg: the mass spectrum gives it none of the ions of")
    assert "23.90-24.30 Da (Mg+, C2+)" in msgs[0] and "no reason" in msgs[0] and "--ranges" in msgs[0]
    with warnings.catch_warnings(record=True) as got:
        warnings.simplefilter("always")
        _warn_unseparated(rr, A, is_metal, mixed, clean_m, "no reason", np.array([0.3, 1.0, 0.96, 1.0]))
    assert not got  # the spectrum did give Mg a share of the range: nothing to name


def test_an_amount_at_the_bound_does_not_claim_a_zero_error():
    """The spectrum alone puts 24Mg+ at zero under C2+: its error is undetermined (NaN), not 0,
    and a free species at zero with its own window gets the error it would have if free."""
    from probeseq.pipeline.stages import range_sample

    run = simulate_run(metals=("Mg", "Co"), fragments="carbon-rich", organic_per_site=3.0, mrp=400,
                       depth_nm=24, top_radius_nm=6, seed=7, pattern="long-block")
    rr = range_sample(run.ions, ("Mg", "Co"))
    sp = {s["ion"]: s for s in rr.to_dict()["species"]}
    assert sp["Mg+"]["amount"] == 0.0 and sp["Mg+"]["amount_err"] is None and sp["Mg+"]["amount_high"] is None
    at_zero = [s for s in sp.values() if s["amount"] == 0.0]
    assert all(s["amount_err"] is None or s["amount_err"] > 0 for s in at_zero)
    assert any(s["amount_err"] is not None and s["amount_high"] > 0 for s in at_zero)
    fitted = [s for s in sp.values() if s["amount"] > 0]
    assert all(s["amount_low"] <= s["amount"] <= s["amount_high"] for s in fitted)


def test_an_undetermined_metal_ion_is_named_with_what_covers_it():
    from probeseq.pipeline.stages import range_sample
    from probeseq.ranging.spatial import warn_undetermined

    run = simulate_run(metals=("Mg", "Co"), fragments="carbon-rich", organic_per_site=3.0, mrp=400,
                       depth_nm=24, top_radius_nm=6, seed=7, pattern="long-block")
    rr = range_sample(run.ions, ("Mg", "Co"))  # the spectrum alone, before the spatial refit
    with pytest.warns(DataQualityWarning, match=r"Mg: Mg\+ cannot be told apart from .*C2\+") as rec:
        warn_undetermined(rr)
    assert "higher resolving power" in str(rec[0].message)


def test_a_refit_where_no_fragment_is_there_leaves_the_spectrum_composition():
    """Ranges whose design holds a fragment line the fit puts at zero (58Ni2+ near 13CO+ at 29 Da,
    64Zn2+ at 32 Da) are refitted with their spatial share, which reads all metal. The share
    constrains the split of a range's ions, not their number (docs/REFERENCES.md §6), so such a
    refit leaves the composition where the spectrum put it; a row "metal = share x counts" moved
    Ni by 0.0065 on this run, tying it to one isotope line's count."""
    from probeseq.pipeline import AnalysisOptions, analyze

    metals = ("Co", "Ni", "Zn")
    run = simulate_run(metals=metals, depth_nm=24, top_radius_nm=6, seed=4, pattern="random")
    d = analyze(run.ions, metals, run.lattice, options=AnalysisOptions(seed=1, n_boot=20)).to_dict()
    assert any(r["used"] for r in d["ranging"]["overlap_refinement"])  # the refit did run
    spectrum = d["ranging"]["composition_spectrum_only"]
    for m in metals:
        assert abs(d["composition"][m] - spectrum[m]) < 1e-3


def test_a_light_metal_under_fragments_is_split_under_a_high_background():
    """A quarter of the ions spread evenly as background: the clean metal lines hold a few per
    cent of it. They must still serve as the metal reference (judged by their species, not
    their background), and the reference is cleaned of that background (docs/REFERENCES.md §6);
    otherwise the refit is skipped and Mg keeps the spectrum's 0.38 against a true 0.485."""
    from probeseq.pipeline import AnalysisOptions, analyze

    run = simulate_run(metals=("Mg", "Co"), fragments="carbon-rich", organic_per_site=3.0, mrp=400,
                       depth_nm=24, top_radius_nm=6, seed=7, pattern="long-block", background_fraction=0.25)
    d = analyze(run.ions, ("Mg", "Co"), run.lattice, options=AnalysisOptions(seed=1, n_boot=20)).to_dict()
    assert any(r["used"] for r in d["ranging"]["overlap_refinement"])
    detected = np.bincount(run.ion_metal[run.ion_metal >= 0], minlength=2) / np.sum(run.ion_metal >= 0)
    assert abs(d["composition"]["Mg"] - detected[0]) < 0.012
    assert abs(d["composition"]["Mg"] - run.truth["composition_sites"]["Mg"]) < 0.02


def test_ranging_without_the_lattice_names_a_metal_whose_split_it_cannot_check(tmp_path):
    """The range command has no rod lattice, so it cannot refit 24Mg+ under C2+: the spectrum alone
    gives Mg 0.38 for a true 0.485 here, and a warning names the ranges; a run whose lines do not
    overlap gets no such warning."""
    import warnings

    from probeseq.io.readers import write_ions
    from probeseq.pipeline.stages import range_file

    def messages(run, metals):
        path = tmp_path / f"{'_'.join(metals)}.h5"
        write_ions(run.ions, path)
        with warnings.catch_warnings(record=True) as got:
            warnings.simplefilter("always")
            rr, _ = range_file(path, metals)
        return [str(w.message) for w in got], rr

    run = simulate_run(metals=("Mg", "Co"), fragments="carbon-rich", organic_per_site=3.0, mrp=400,
                       depth_nm=24, top_radius_nm=6, seed=7, pattern="long-block")
    msgs, rr = messages(run, ("Mg", "Co"))
    assert rr.composition[0] < run.truth["composition_sites"]["Mg"] - 0.05
    named = [m for m in msgs if m.startswith("Mg: the mass spectrum gives it none of the ions of")]
    assert len(named) == 1 and "(Mg+, C2+)" in named[0] and "without the rod lattice" in named[0]
    msgs, _ = messages(simulate_run(metals=("Co", "Zn"), depth_nm=12, top_radius_nm=5, seed=3), ("Co", "Zn"))
    assert not [m for m in msgs if "mass spectrum gives it none" in m or "every line overlaps" in m]
