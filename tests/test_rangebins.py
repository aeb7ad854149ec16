"""Mass bins inside the ranges (probeseq.ranging.rangebins): each metal's share of the ions at each
mass-to-charge of a range shared by a metal line and a fragment line."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy.stats import norm

from probeseq.ranging.auto import auto_range
from probeseq.ranging.calibration import Calibration
from probeseq.ranging.channels import assign_channels
from probeseq.ranging.isotopes import isotope_pattern
from probeseq.ranging.rangebins import BINS_PER_WIDTH, MAX_BINS, one_bin_per_range, range_bins
from probeseq.ranging.ranges import Range, RangeSet
from probeseq.ranging.spectrum import PeakShape
from probeseq.simulation.simulate import simulate_run

METALS = ("Mg", "Zn")
SHAPE = PeakShape(r0=600.0, beta=0.0, mu=0.0, sigma=1 / 2.3548)  # a Gaussian of FWHM m / 600, no tail
LOW, HIGH = 23.93, 24.07  # a window on 24Mg+ (23.985 Da) and 12C2+ (24.000 Da)


def _result(amounts, background=0.0, shape=SHAPE, shares=(("C2", 1, 0.6), ("Mg", 1, 0.4))):
    """A ranging result of one range holding Mg+ and C2+ (what range_bins reads of one)."""
    ranges = RangeSet((Range(LOW, HIGH, shares[0][0], shares[0][1], shares),), METALS)
    return SimpleNamespace(ranges=ranges, species=(("Mg", 1), ("C2", 1)), amounts=np.asarray(amounts, float),
                           species_metal_atoms=np.array([[1, 0], [0, 0]]), peak_shape=shape,
                           calibration=Calibration(np.array([1.0, 0.0])), background_counts=np.array([background]),
                           metals=METALS)


def _line_ions(formula, edges):
    """Share of a species' ions in each bin of ``edges``: its isotope lines, each a Gaussian of
    standard deviation ``L / (600 * 2.3548)`` (the density of SHAPE written out with scipy)."""
    p = isotope_pattern(formula, 1)
    out = np.zeros(edges.size - 1)
    for line, f in zip(p.mass_to_charge_da, p.fractions):
        cdf = norm.cdf(edges, loc=line, scale=line / 600.0 / 2.3548)
        out += f * np.diff(cdf)
    return out


def test_bin_shares_are_the_ratio_of_the_two_line_densities():
    n_mg, n_c2 = 3000.0, 7000.0
    rr = _result([n_mg, n_c2])
    edges_r = np.array([LOW, HIGH])
    mg_r, c2_r = n_mg * _line_ions("Mg", edges_r), n_c2 * _line_ions("C2", edges_r)
    range_share = mg_r / (mg_r + c2_r)
    w = np.array([[range_share[0], 0.0]])
    bins = range_bins(rr, w)
    n = int(bins.start[1])
    # bins of about w(m) / BINS_PER_WIDTH, w(m) = m / 600
    assert n == min(int(np.ceil((HIGH - LOW) * BINS_PER_WIDTH * 600 / (0.5 * (LOW + HIGH)))), MAX_BINS)
    assert bins.scale[0] == pytest.approx(n / (HIGH - LOW))
    edges = np.linspace(LOW, HIGH, n + 1)
    mg, c2 = n_mg * _line_ions("Mg", edges), n_c2 * _line_ions("C2", edges)
    np.testing.assert_allclose(bins.share[:, 0], mg / (mg + c2), rtol=1e-7, atol=1e-12)
    assert not bins.share[:, 1].any()  # Zn has no line here
    # the low-mass flank is the metal's, the high-mass side the fragment's
    assert bins.share[0, 0] > 0.8 > 0.05 > bins.share[-1, 0]
    # where the metal's ions fall over the bins (for the own ion's evidence)
    np.testing.assert_allclose(bins.metal_split[:, 0], mg / mg.sum(), rtol=1e-7)
    # the bins average back to the range's share, weighted by the ions in them
    assert ((mg + c2) * bins.share[:, 0]).sum() / (mg + c2).sum() == pytest.approx(range_share[0], rel=1e-9)


def test_bins_keep_the_range_share_given():
    # a range file rounds its shares (or the spatial refit moved them): the bins redistribute the given
    # share of the range, they do not replace it
    rr = _result([3000.0, 7000.0])
    w_model = range_bins(rr, np.array([[0.25, 0.0]]))
    w_half = range_bins(rr, np.array([[0.125, 0.0]]))
    np.testing.assert_allclose(w_half.share[:, 0], 0.5 * w_model.share[:, 0], rtol=1e-12)
    np.testing.assert_array_equal(w_half.start, w_model.start)


def test_background_lowers_the_share_in_the_tails():
    rr0, rr1 = _result([3000.0, 7000.0]), _result([3000.0, 7000.0], background=500.0)
    w = np.array([[0.3, 0.0]])
    s0, s1 = range_bins(rr0, w).share[:, 0], range_bins(rr1, w).share[:, 0]
    ratio = s1 / s0
    # a flat background takes most where the lines are weakest: the window's ends
    assert ratio[0] < ratio[s0.size // 2] and ratio[-1] < ratio[s0.size // 2]


def test_one_bin_without_a_shape_or_a_fragment():
    w = np.array([[0.3, 0.0]])
    one = range_bins(_result([3000.0, 7000.0], shape=None), w)
    np.testing.assert_array_equal(one.start, [0, 1])
    np.testing.assert_array_equal(one.share, w)
    # a metal's ion and background only: nothing to tell apart within the range
    pure = range_bins(_result([3000.0, 0.0], background=300.0, shares=(("Mg", 1, 0.91),)), np.array([[0.91, 0.0]]))
    assert pure.n_bins == 1 and pure.share[0, 0] == 0.91
    flat = one_bin_per_range(np.array([[1.0, 0.0], [0.0, 0.0], [0.2, 0.5]]))
    np.testing.assert_array_equal(flat.bin_of([2, -1, 0], [1.0, 2.0, 3.0]), [2, -1, 0])


def test_bin_of_clips_to_the_range():
    rr = _result([3000.0, 7000.0])
    bins = range_bins(rr, np.array([[0.3, 0.0]]))
    n = bins.n_bins
    m = np.array([LOW, np.nextafter(HIGH, 0), LOW + (HIGH - LOW) * 0.5, LOW - 1e-9, HIGH + 1e-9], np.float64)
    got = bins.bin_of(np.zeros(m.size, int), m)
    assert got[0] == 0 and got[1] == n - 1 and got[3] == 0 and got[4] == n - 1
    assert got[2] == int(np.floor((m[2] - LOW) * bins.scale[0]))
    # float32 values are read as the pass reads them (converted to float64 first)
    m32 = (LOW + (HIGH - LOW) * np.random.default_rng(1).random(1000)).astype(np.float32)
    exp = np.minimum(np.floor((m32.astype(np.float64) - LOW) * bins.scale[0]).astype(int), n - 1)
    np.testing.assert_array_equal(bins.bin_of(np.zeros(m32.size, int), m32), np.maximum(exp, 0))


@pytest.mark.filterwarnings("ignore::probeseq.exceptions.DataQualityWarning")
def test_bins_tell_the_metal_from_the_fragments_on_a_simulated_run():
    """On a run whose Mg lines sit under carbon fragment lines, the bins' shares explain which ions are
    metal better than one share per range (Bernoulli log-likelihood of the true identities)."""
    run = simulate_run(pattern="random", metals=METALS, fragments="carbon-rich", top_radius_nm=7.0, depth_nm=20.0,
                       seed=11)
    m = run.ions.mass_to_charge
    rr = auto_range(m, METALS)
    ca = assign_channels(m, rr.ranges, METALS)
    w = np.asarray(ca.metal_weights)[:-1]
    bins = range_bins(rr, w)
    cut = np.flatnonzero(np.diff(bins.start) > 1)
    assert cut.size >= 1
    ri = ca.range_index
    for j in cut:
        inr = np.flatnonzero(ri == j)
        y = run.ion_metal[inr] >= 0
        s_bin = np.clip(bins.share[bins.bin_of(ri[inr], m[inr])].sum(axis=1), 1e-6, 1 - 1e-6)
        s_rng = np.clip(w[j].sum(), 1e-6, 1 - 1e-6)
        ll_bin = float(np.sum(np.where(y, np.log(s_bin), np.log1p(-s_bin))))
        ll_rng = float(np.sum(np.where(y, np.log(s_rng), np.log1p(-s_rng))))
        assert ll_bin > ll_rng, (rr.ranges[j], ll_bin, ll_rng)
        assert s_bin[y].mean() > s_bin[~y].mean()
