"""Ranging on simulated runs with known truth; range files; channel assignment; bad input."""

import numpy as np
import pytest

from probeseq import InputError
from probeseq.ranging.auto import auto_range
from probeseq.ranging.channels import ChannelAssignment, assign_channels, channel_tables
from probeseq.ranging.isotopes import isotope_pattern
from probeseq.ranging.ranges import Range, RangeSet
from probeseq.simulation.simulate import simulate_run
from probeseq.utils.palette import OTHER, metal_colour

SMALL = dict(top_radius_nm=6.0, depth_nm=30.0)  # ~77 000 ions, ~15 000 metal ions


def _extra_ions(rng, formula, charge, n, mrp=600.0, tail_fraction=0.5, tail_scale=1.5):
    """Ions of one species with the simulator's peak shape (Gaussian of FWHM m/mrp plus an
    exponential high-mass tail), for species the simulator does not make."""
    p = isotope_pattern(formula, charge)
    m = p.mass_to_charge_da[rng.choice(p.n_lines, size=n, p=p.fractions / p.fractions.sum())]
    m = m + rng.normal(0, 1, n) * m / mrp / 2.3548
    t = rng.random(n) < tail_fraction
    m[t] += rng.exponential(1.0, t.sum()) * tail_scale * m[t] / mrp
    return m


def _true_fractions(run):
    im = run.ion_metal[run.ion_metal >= 0]
    c = np.bincount(im, minlength=len(run.config.metals)).astype(float)
    return c / c.sum()


def _species_counts(run):
    sp = run.truth["species"]
    c = np.bincount(run.ion_species[run.ion_species >= 0], minlength=len(sp))
    return {(s["formula"], s["charge"]): int(n) for s, n in zip(sp, c)}


@pytest.fixture(scope="module")
def cozn():
    run = simulate_run(metals=("Co", "Zn"), composition=(0.6, 0.4), seed=21, **SMALL)
    return run, auto_range(run.ions, ["Co", "Zn"])


@pytest.fixture(scope="module")
def nizn():
    run = simulate_run(metals=("Ni", "Zn"), composition=(0.5, 0.5), seed=22, **SMALL)
    return run, auto_range(run.ions, ["Ni", "Zn"])


# ---------------------------------------------------------------------------- composition
def test_composition_recovered_on_simulated_run(cozn):
    run, res = cozn
    truth = _true_fractions(run)
    assert (run.ion_metal >= 0).sum() >= 1e4
    np.testing.assert_allclose(res.composition, truth, atol=0.01)
    assert np.all(np.abs(res.composition - truth) < 4 * res.composition_sigma + 2e-3)
    assert abs(res.composition.sum() - 1) < 1e-12


def test_composition_uncertainty_is_at_least_counting_error(cozn):
    run, res = cozn
    n_atoms = res.metal_atoms.sum()
    x = res.composition[0]
    binomial = np.sqrt(x * (1 - x) / n_atoms)  # counting alone, no background
    assert binomial <= res.composition_sigma[0] < 3 * binomial


def test_every_strong_simulated_peak_is_ranged_and_every_range_has_a_species(cozn):
    run, res = cozn
    counts = _species_counts(run)
    lows, highs = res.ranges.lows_da, res.ranges.highs_da
    n_checked = 0
    for (f, z), n in counts.items():
        p = isotope_pattern(f, z)
        for pos, frac in zip(p.mass_to_charge_da, p.fractions):
            if n * frac >= 50:
                k = np.searchsorted(lows, pos, side="right") - 1
                assert k >= 0 and pos < highs[k], f"line {pos:.3f} of {f}{'+' * z} ({n * frac:.0f} ions) unranged"
                n_checked += 1
    assert n_checked > 25
    for r in res.ranges:
        assert r.shares and max(p for _, _, p in r.shares) > 0
    assert len(res.unmatched) == 0  # the simulator makes only predicted species


def test_ranges_include_high_mass_tail(cozn):
    _, res = cozn
    for j, r in enumerate(res.ranges):
        p = res.range_peak[j]
        pos, fw = res.peaks.position_da[p], res.peaks.fwhm_da[p]
        if res.peaks.net_counts[p] > 500:
            assert r.high_da - pos > (pos - r.low_da)  # wider on the high-mass side


def test_background_counts_match_simulated_uniform_background(cozn):
    run, res = cozn
    # the simulator's background is uniform in m/z over [1, 1.15 * largest line)
    n_bg = int((run.ion_species < 0).sum())
    top = max(isotope_pattern(s["formula"], s["charge"]).mass_to_charge_da.max() for s in run.truth["species"]) * 1.15
    density = n_bg / (top - 1.0)
    widths = res.ranges.highs_da - res.ranges.lows_da
    expected = density * widths.sum()
    got = res.background_counts.sum()
    assert abs(got - expected) < 0.25 * expected


def test_matched_peaks_and_calibration_residuals(cozn):
    _, res = cozn
    cal = res.calibration
    assert cal.residuals_da.size >= 10
    assert cal.rms_da < 0.01
    # no calibration error was simulated; only the thermal tail moves the measured tops of the
    # peaks up, by a constant fraction of m/z (well under a quarter of the FWHM = m/600)
    np.testing.assert_allclose(cal.predict(np.array([10.0, 60.0])), [10.0, 60.0], rtol=6e-4)


def test_calibration_error_is_found_and_corrected():
    run = simulate_run(metals=("Co", "Zn"), composition=(0.6, 0.4), seed=23, **SMALL)
    s = 1.002  # flight-time scale error: m/z off by 0.4 %
    m = run.ions.mass_to_charge * s ** 2
    res = auto_range(m, ["Co", "Zn"])
    assert abs(res.calibration.coefficients[0] - s) < 3e-4
    assert res.calibration.rms_da < 0.01
    np.testing.assert_allclose(res.composition, _true_fractions(run), atol=0.01)
    co = [r for r in res.ranges if r.label == "Co+"][0]
    assert co.low_da < 58.9332 * s ** 2 < co.high_da


# ---------------------------------------------------------------------------- overlaps
def test_nickel_zinc_overlap_is_deconvolved(nizn):
    run, res = nizn
    np.testing.assert_allclose(res.composition, _true_fractions(run), atol=0.01)
    j = [k for k, r in enumerate(res.ranges) if r.low_da < 63.928 < r.high_da][0]
    assert j in res.deconvolved
    shares = {(f, z): p for f, z, p in res.ranges[j].shares}
    assert ("Ni", 1) in shares and ("Zn", 1) in shares
    # expected 64Ni+ share: Ni+ ions x 64Ni fraction over the ions in the range
    truth = _species_counts(run)
    f64 = isotope_pattern("Ni").fractions[-1]  # 64Ni (0.9256 %, periodictable 2.1)
    expected = truth[("Ni", 1)] * f64 / res.gross_counts[j]
    assert abs(shares[("Ni", 1)] - expected) < 0.5 * expected
    # amounts of each species over all isotopes, against the simulated ion counts
    amt = dict(zip(res.species, res.amounts))
    sig = dict(zip(res.species, res.amounts_sigma))
    for key in [("Ni", 1), ("Zn", 1), ("Ni", 2), ("Zn", 2)]:
        assert abs(amt[key] - truth[key]) < 0.04 * truth[key] + 4 * sig[key], key


def test_weights_of_shared_range_follow_shares(nizn):
    _, res = nizn
    ca = res.assign(res.search.spectrum.centres_da)
    j = [k for k, r in enumerate(res.ranges) if r.low_da < 63.928 < r.high_da][0]
    w = ca.metal_weights[j]
    shares = {(f, z): p for f, z, p in res.ranges[j].shares}
    assert abs(w[0] - shares[("Ni", 1)]) < 1e-9 and abs(w[1] - shares[("Zn", 1)]) < 1e-9
    assert ca.range_channel[j] == 1  # Zn carries most of the range


def test_doubly_charged_ion_under_singly_charged_one():
    # 64Zn2+ (31.964) lies under O2+ (31.990); 66Zn2+ and 68Zn2+ fix the Zn2+ amount
    rng = np.random.default_rng(5)
    run = simulate_run(metals=("Co", "Zn"), composition=(0.6, 0.4), seed=24, **SMALL)
    m = np.concatenate([run.ions.mass_to_charge, _extra_ions(rng, "O2", 1, 4000)])
    res = auto_range(m, ["Co", "Zn"])
    j = [k for k, r in enumerate(res.ranges) if r.low_da < 31.97 < r.high_da][0]
    assert j in res.deconvolved
    shares = {(f, z): p for f, z, p in res.ranges[j].shares}
    assert shares.get(("O2", 1), 0) > 0.3 and shares.get(("Zn", 2), 0) > 0.2
    np.testing.assert_allclose(res.composition, _true_fractions(run), atol=0.01)
    zn2 = dict(zip(res.species, res.amounts))[("Zn", 2)]
    assert abs(zn2 / _species_counts(run)[("Zn", 2)] - 1) < 0.06


def test_unknown_peak_is_listed_not_dropped():
    rng = np.random.default_rng(6)
    run = simulate_run(metals=("Co", "Zn"), composition=(0.6, 0.4), seed=25, **SMALL)
    extra = rng.normal(37.52, 37.52 / 600 / 2.3548, 1500)  # nothing is predicted at 37.5 Da
    res = auto_range(np.concatenate([run.ions.mass_to_charge, extra]), ["Co", "Zn"])
    pos = res.peaks.position_da[res.unmatched]
    assert np.any(np.abs(pos - 37.52) < 0.02)
    assert not any(r.low_da < 37.52 < r.high_da for r in res.ranges)
    d = res.to_dict()
    assert any(abs(u["position_da"] - 37.52) < 0.02 and u["nearest_prediction"] for u in d["unmatched_peaks"])
    np.testing.assert_allclose(res.composition, _true_fractions(run), atol=0.01)


# ---------------------------------------------------------------------------- user ranges
def test_user_ranges_are_quantified(cozn):
    run, res = cozn
    plain = RangeSet(tuple(Range(r.low_da, r.high_da, r.formula, r.charge) for r in res.ranges))
    again = auto_range(run.ions, ["Co", "Zn"], ranges=plain)
    np.testing.assert_allclose(again.composition, res.composition, atol=2e-3)
    assert all(r.shares for r in again.ranges)
    assert np.all(again.range_peak == -1)


def test_user_range_without_its_species_raises(cozn):
    run, res = cozn
    bad = RangeSet((Range(58.7, 59.3, "Zn", 1), Range(63.8, 64.3, "Zn", 1)))
    with pytest.raises(InputError, match=r"58.7-59.3 Da \(Zn\+\) holds no isotope line of Zn\+"):
        auto_range(run.ions, ["Zn"], ranges=bad)


# ---------------------------------------------------------------------------- channels
def _brute(m, lows, highs):
    out = np.full(m.shape, -1, dtype=np.int64)
    for j, (a, b) in enumerate(zip(lows, highs)):
        out[(m >= a) & (m < b)] = j
    return out


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_assign_channels_is_exact_at_edges(dtype, rng):
    rs = RangeSet((Range(1.0, 1.02, "H", 1), Range(11.98, 12.06, "C", 1), Range(29.41, 29.6001, "Co", 2),
                   Range(29.6001, 29.7, "Zn", 2), Range(58.8, 59.25, "Co", 1), Range(63.8, 64.4, "ZnO", 1)))
    edges = np.concatenate([rs.lows_da, rs.highs_da]).astype(dtype)
    m = np.concatenate([rng.uniform(0.2, 80, 200_000).astype(dtype), edges,
                        np.nextafter(edges, dtype(0)), np.nextafter(edges, dtype(1e9)),
                        np.array([0.0, 1e12, 2048.0, 63.8, 63.8 + 1 / 1024], dtype=dtype)])
    ca = assign_channels(m, rs, ["Co", "Zn"])
    ref = _brute(m.astype(np.float64), rs.lows_da, rs.highs_da)
    np.testing.assert_array_equal(ca.range_index, ref)
    assert ca.range_index.dtype == np.int32 and ca.channel.dtype == np.int8


def test_assign_channels_handles_nan_and_negative():
    rs = RangeSet((Range(10.0, 11.0, "Co", 1),))
    ca = assign_channels(np.array([np.nan, -5.0, np.inf, 10.5, -np.inf]), rs, ["Co"])
    assert ca.range_index.tolist() == [-1, -1, -1, 0, -1]


def test_channel_weights_and_labels():
    rs = RangeSet((
        Range(11.9, 12.1, "C", 1),
        Range(58.8, 59.2, "Co", 1),
        Range(63.8, 64.2, "Zn", 1, (("Zn", 1, 0.6), ("Ni", 1, 0.3))),
        Range(79.8, 80.3, "ZnO", 1),
        Range(133.0, 134.0, "Co2O", 1),
    ))
    m = np.array([12.0, 59.0, 64.0, 80.0, 133.5, 50.0])
    ca = assign_channels(m, rs, ["Co", "Zn", "Ni"])
    K = 3
    assert ca.metal_weights.shape == (len(rs) + 1, K)
    np.testing.assert_array_equal(ca.metal_weights[-1], 0)
    np.testing.assert_allclose(ca.weights(), [[0, 0, 0], [1, 0, 0], [0, 0.6, 0.3], [0, 1, 0], [2, 0, 0], [0, 0, 0]])
    assert ca.channel.tolist() == [K, 0, 1, 1, 0, K + 1]
    assert ca.is_other.tolist() == [True, False, False, False, False, False]
    assert ca.is_unranged.tolist() == [False] * 5 + [True]
    np.testing.assert_allclose(ca.weights(np.array([2, 5])), [[0, 0.6, 0.3], [0, 0, 0]])
    np.testing.assert_allclose(ca.metal_counts(), [3, 1.6, 0.3])
    w, other, ch = channel_tables(rs, ["Co", "Zn", "Ni"])
    assert other.tolist() == [1, 0, 0, 0, 0, 0]


def test_channels_work_on_chunks(cozn):
    run, res = cozn
    m = run.ions.mass_to_charge.astype(np.float32)
    whole = res.assign(m)
    parts = [res.assign(m[s:s + 10_007]) for s in range(0, m.size, 10_007)]
    joined = ChannelAssignment.concatenate(parts)
    np.testing.assert_array_equal(joined.range_index, whole.range_index)
    np.testing.assert_array_equal(joined.channel, whole.channel)
    # ions of the true metal land in that metal's channel
    metal = run.ion_metal >= 0
    agree = (whole.channel[metal] == run.ion_metal[metal]).mean()
    assert agree > 0.9


def test_assignment_background_corrected_counts_match_composition(cozn):
    run, res = cozn
    counts = res.assign(run.ions.mass_to_charge).metal_counts()
    frac = counts / counts.sum()
    assert np.all(np.abs(frac - res.composition) < 0.01)


# ---------------------------------------------------------------------------- range files
def test_toml_round_trip(tmp_path, cozn):
    _, res = cozn
    path = tmp_path / "ranges.toml"
    res.to_toml(path)
    back = RangeSet.from_toml(path)
    assert back.metals == ("Co", "Zn")
    assert len(back) == len(res.ranges)
    for a, b in zip(back, res.ranges):
        assert (a.formula, a.charge) == (b.formula, b.charge)
        assert abs(a.low_da - b.low_da) < 1e-5 and abs(a.high_da - b.high_da) < 1e-5
        assert [(f, z) for f, z, _ in a.shares] == [(f, z) for f, z, _ in b.shares]
        np.testing.assert_allclose([p for *_, p in a.shares], [p for *_, p in b.shares], rtol=1e-5)
    exact = RangeSet((Range(1.0, 1.25, "H", 1), Range(63.5, 64.5, "Zn", 1, (("Zn", 1, 0.75), ("Ni", 1, 0.125)))),
                     ("Zn", "Ni"))
    assert RangeSet.from_toml_text(exact.to_toml()) == exact


def _toml(body):
    return "format = 1\n" + body


GOOD = '[[range]]\nformula = "Co"\ncharge = 1\nlow = 58.8\nhigh = 59.2\n'


@pytest.mark.parametrize("text, words", [
    (GOOD + '\n[[range]]\nformula = "Zn"\ncharge = 1\nlow = 63.8\n', ["line 8 (range 2)", "missing field 'high'"]),
    (GOOD + '\n[[range]]\nformula = "Zn"\nlow = 63.8\nhigh = 64.0\n', ["line 8", "missing field 'charge'"]),
    ('[[range]]\nformula = "Co"\ncharge = 1\nlow = 59.2\nhigh = 58.8\n', ["line 2", "'low' (59.2) must be below 'high' (58.8)"]),
    (GOOD + '\n[[range]]\nformula = "Co"\ncharge = 1\nlow = 59.0\nhigh = 59.5\n',
     ["line 2 and", "line 8", "overlapping ranges of the same species Co+"]),
    (GOOD + '\n[[range]]\nformula = "Zn"\ncharge = 1\nlow = 59.0\nhigh = 59.5\n', ["overlap", "shares"]),
    ('[[range]]\nformula = "Xx"\ncharge = 1\nlow = 1\nhigh = 2\n', ["line 2", "unknown element 'Xx'"]),
    ('[[range]]\nformula = "Co"\ncharge = 0\nlow = 1\nhigh = 2\n', ["'charge' must be an integer >= 1"]),
    ('[[range]]\nformula = "Co"\ncharge = 1\nlow = "a"\nhigh = 2\n', ["'low' must be a number"]),
    ('[[range]]\nformula = "Co"\ncharge = 1\nlow = 1\nhigh = 2\nhihg = 3\n', ["line 7", "unknown field 'hihg'"]),
    ('[[range]]\nformula = "Co"\ncharge = 1\nlow = 1\nhigh = 2\nshares = { "Co+" = 0.8, "Zn+" = 0.5 }\n',
     ["shares add up to 1.3"]),
    ('[[range]]\nformula = "Co"\ncharge = 1\nlow = 1\nhigh = 2\nshares = { "Zn+" = 0.5 }\n', ["own species 'Co+'"]),
    ('[[range]\nformula = "Co"\n', ["not valid TOML"]),
    ("", ["no [[range]] tables"]),
    ('colour = "red"\n' + GOOD, ["unknown top-level field 'colour'"]),
])
def test_bad_range_files_raise_one_line(text, words):
    with pytest.raises(InputError) as e:
        RangeSet.from_toml_text(_toml(text), where="r.toml")
    msg = str(e.value)
    assert "\n" not in msg and msg.startswith("r.toml")
    for w in words:
        assert w in msg, msg


def test_missing_range_file(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        RangeSet.from_toml(tmp_path / "nope.toml")


# ---------------------------------------------------------------------------- bad input
def test_absent_metal_names_metal_place_and_findings(cozn):
    run, _ = cozn
    with pytest.raises(InputError) as e:
        auto_range(run.ions, ["Co", "Ni"])
    msg = str(e.value)
    assert "\n" not in msg
    assert "metal 'Ni'" in msg and "Ni+ 57.935" in msg and "looked for" in msg and "found" in msg


def test_no_counts_in_window(cozn):
    run, _ = cozn
    with pytest.raises(InputError, match="no counts in the requested window 300-400 Da"):
        auto_range(run.ions, ["Co", "Zn"], range_da=(300, 400))


@pytest.mark.parametrize("metals, words", [(["Xx"], "unknown element"), (["Co", "Co"], "twice"), ([], "at least one"),
                                           (["CoO"], "not an element symbol")])
def test_bad_metals(metals, words, cozn):
    run, _ = cozn
    with pytest.raises(InputError, match=words):
        auto_range(run.ions, metals)


def test_bad_species_and_parameters(cozn):
    run, _ = cozn
    with pytest.raises(InputError, match="unknown element 'Qq'"):
        auto_range(run.ions, ["Co", "Zn"], species=["CO", "Qq"])
    with pytest.raises(InputError, match="high_fraction"):
        auto_range(run.ions, ["Co", "Zn"], high_fraction=1.5)


def test_custom_species_list(cozn):
    run, _ = cozn
    res = auto_range(run.ions, ["Co", "Zn"], species=["H", "H2", "C", "C++", "O", "OH", "H2O", "CO", "C2H2", "CO2"])
    np.testing.assert_allclose(res.composition, _true_fractions(run), atol=0.01)
    assert {(f, z) for f, z in res.species} >= {("C", 2), ("CO2", 1)}
    assert ("CH3", 1) not in res.species


# ---------------------------------------------------------------------------- figure
def test_figure_written_with_channel_colours(tmp_path, cozn):
    from matplotlib.colors import to_hex

    from probeseq.ranging.plot import plot_ranging

    _, res = cozn
    fig = plot_ranging(res, tmp_path / "spectrum")
    assert (tmp_path / "spectrum.png").stat().st_size > 10_000
    assert (tmp_path / "spectrum.svg").stat().st_size > 10_000
    ax = fig.axes[0]
    assert ax.get_yscale() == "log"
    colours = {to_hex(p.get_facecolor(), keep_alpha=False) for p in ax.patches}
    assert {metal_colour(0).lower(), metal_colour(1).lower(), OTHER.lower()} <= colours
    labels = [t.get_text() for t in ax.texts]
    assert any("Co" in t for t in labels) and any("Zn" in t for t in labels)


def test_spectrum_without_peaks_names_the_metal(rng):
    m = rng.uniform(1.0, 100.0, 20000)
    with pytest.raises(InputError, match="metal 'Co'.*no peaks were detected at all"):
        auto_range(m, ["Co", "Zn"])


def test_point_lines_option_still_recovers_composition(cozn):
    run, _ = cozn
    res = auto_range(run.ions, ["Co", "Zn"], peak_shape=False)
    assert res.peak_shape is None
    np.testing.assert_allclose(res.composition, _true_fractions(run), atol=0.01)
