"""Soft site evidence (probeseq.lattice.evidence): the lateral width, the extras' shares, the
per-ion increments of the fused pass and the linear reading of the decoder."""

from __future__ import annotations

import dataclasses
import itertools
import math

import numpy as np
import pytest
from test_counting import METALS, as_dict, fitted, run  # noqa: F401 (fixtures)
from test_decode import make_columns

from probeseq.decoding.decode import decode
from probeseq.decoding.model import DecoderParams
from probeseq.lattice.columns import ColumnBinner, assign_rods
from probeseq.lattice.counting import CountPass, make_count_plan
from probeseq.lattice.evidence import (N_LEVELS, UNITS, LateralSpread, _cell_d2, evidence_table, extras_shares,
                                       fit_lateral_spread, own_fractions, remove_own, run_evidence_table)
from probeseq.ranging.channels import _weights_for, assign_channels
from probeseq.ranging.rangebins import RangeBins, one_bin_per_range


def _cell_points(locator, n, rng):
    """Points spread evenly over a rod's cell: squared distances to the axis drawn from the grid."""
    d2 = _cell_d2(locator)
    pick = rng.integers(0, d2.size, n)
    jitter = rng.random(n)  # within the grid cell: small; enough for a distribution check
    return np.sqrt(d2[pick]) * (0.98 + 0.04 * jitter)


def _gauss_distances(sigma, n, rng):
    return np.hypot(rng.normal(0, sigma, n), rng.normal(0, sigma, n))


def _lattice_distances(locator, sigma, n, rng):
    """Own ions about every rod of the unit cell (2-D Gaussian), each at its distance to its nearest
    axis found by brute force, as the count pass sees them: those that stray nearer a neighbour
    are that neighbour's, at their distance to it."""
    lat = locator.lattice
    out = []
    for b in range(lat.rods_per_cell):
        off = rng.normal(0.0, sigma, (n // lat.rods_per_cell, 2)) @ np.linalg.inv(lat.cell_matrix).T
        f = lat.rods_frac[b] + off
        d2 = locator.nearest_exact(f[:, 0], f[:, 1])[3]
        out.append(np.sqrt(d2[d2 < locator.cutoff_nm ** 2]))
    return np.concatenate(out)


def test_lateral_spread_recovers_the_width(fitted):  # noqa: F811
    _, _, geom = fitted
    rng = np.random.default_rng(1)
    for sigma in (0.1, 0.2):
        own = _lattice_distances(geom.locator, sigma, 8000, rng)
        d = np.concatenate([own, _cell_points(geom.locator, 2000, rng)])
        sp = fit_lateral_spread(d, geom.locator)
        assert sp.fitted
        assert sp.sigma_nm == pytest.approx(sigma, rel=0.08)
        assert sp.own_share == pytest.approx(own.size / d.size, abs=0.05)
    assert not fit_lateral_spread(np.ones(10), geom.locator).fitted


@pytest.mark.parametrize("packing,a,sigma", [("honeycomb", 1.5, 0.2), ("square", 1.0, 0.2), ("honeycomb", 2.6, 0.08)])
def test_lateral_spread_recovers_the_width_where_rods_are_close(packing, a, sigma):
    # where a neighbour's own ions reach into the cell (honeycomb d_nn 0.5 nm with 0.2 nm blur) a
    # Gaussian of the cell's own rod alone read 0.13 nm for a true 0.2 on a simulated run; the fit
    # that holds the neighbours' ions finds the width
    from probeseq.lattice.locator import RodLocator
    from probeseq.lattice.model import Lattice

    lat = Lattice.from_preset(packing, a, 0.68)
    loc = RodLocator.build(lat, 0.75 * lat.nearest_rod_distance_nm, 256)
    rng = np.random.default_rng(8)
    own = _lattice_distances(loc, sigma, 20000, rng)
    d = np.concatenate([own, _cell_points(loc, 5000, rng)])
    sp = fit_lateral_spread(d, loc)
    assert sp.fitted
    assert sp.sigma_nm == pytest.approx(sigma, rel=0.06)


def test_extras_shares_remove_the_own_ions(fitted):  # noqa: F811
    # a range whose ions are 40 % of a metal: the metal's own ions (on the axes) are 30 % of the
    # range, the rest is extras of which 1/7 are the metal
    _, _, geom = fitted
    rng = np.random.default_rng(2)
    sigma = 0.12
    own = _gauss_distances(sigma, 3000, rng)
    extras = _cell_points(geom.locator, 7000, rng)
    d = np.concatenate([own, extras])
    share = np.array([[0.4, 0.0], [1.0, 0.0]])
    ri = np.zeros(d.size, int)
    u = extras_shares(share, d, ri, geom.locator, LateralSpread(sigma, 0.9, 1000, True))
    assert u[0, 0] == pytest.approx(1 / 7, abs=0.03)
    assert u[1, 0] == 1.0  # a pure range keeps its share
    assert u[0, 1] == 0.0
    # no fitted width: the spectrum's shares are kept
    np.testing.assert_array_equal(extras_shares(share, d, ri, geom.locator, LateralSpread(0.15, 0, 0, False)), share)


def test_own_fraction_is_measured_per_metal_on_its_pure_ranges(fitted):  # noqa: F811
    # metal 0's pure range: 80 % of its ions on the axes. Its mixed range (40 % metal 0) gets that
    # own fraction whatever its own ions say (here: none sampled); metal 1 has no pure range and
    # takes the value of all pure ranges
    _, _, geom = fitted
    rng = np.random.default_rng(5)
    sigma = 0.12
    d = np.concatenate([_gauss_distances(sigma, 4000, rng), _cell_points(geom.locator, 1000, rng)])
    share = np.array([[1.0, 0.0], [0.4, 0.0], [0.0, 0.3], [0.2, 0.2]])
    ri = np.zeros(d.size, int)
    spread = LateralSpread(sigma, 0.9, 1000, True)
    c = own_fractions(share, d, ri, geom.locator, spread)
    assert c[0] == 0.0  # a pure range keeps its share
    assert c[1] == pytest.approx(0.8, abs=0.03)
    assert c[2] == c[1] and c[3] == pytest.approx(c[1], rel=1e-12)
    u = extras_shares(share, d, ri, geom.locator, spread)
    assert u[1, 0] == pytest.approx((1 - c[1]) * 0.4 / (1 - c[1] * 0.4), rel=1e-12)
    # the mixed range's own ions do not move it once the metal has a pure range
    d2 = np.concatenate([d, _cell_points(geom.locator, 3000, rng)])
    ri2 = np.concatenate([ri, np.ones(3000, int)])
    np.testing.assert_array_equal(own_fractions(share, d2, ri2, geom.locator, spread), c)


def test_table_quantisation_keeps_the_mean_and_exact_units(fitted):  # noqa: F811
    _, _, geom = fitted
    share = np.array([[1.0, 0.0], [0.0, 1.0], [0.3, 0.1], [0.0, 0.0]])
    ev = evidence_table(share, [0.97, 0.95], [0.9, 0.92], geom.locator, LateralSpread(0.15, 0.9, 1000, True))
    d2 = _cell_d2(geom.locator)
    from probeseq.lattice.evidence import _grid_d2

    inside = _grid_d2(geom.locator) < (geom.locator.cutoff_nm ** 2 if np.isfinite(geom.locator.cutoff_nm) else np.inf)
    assert inside.sum() == d2.size
    # rho averages to 1 over the cell area, so extras add on average their rate
    assert ev.rho_levels[ev.cell_level[inside]].mean() == pytest.approx(1.0, rel=1e-12)
    # every increment is a whole number of 1/UNITS: float32 sums are exact, whatever the order
    inc = ev.increments
    np.testing.assert_array_equal(inc * UNITS, np.rint(inc * UNITS))
    assert inc.shape == (4 * N_LEVELS, 2)
    assert not inc[3 * N_LEVELS:].any()  # a range without metal adds nothing
    # nearer the axis, more evidence (rho falls with the distance)
    lv = ev.cell_level
    near, far = lv[np.argmin(_grid_d2(geom.locator))], lv[inside][np.argmax(d2)]
    assert ev.rho_levels[near] > 3 * ev.rho_levels[far]
    # an own ion adds on average E_g[rho] > 1 times its shares
    assert ev.own_scale[0] > 0.9 / 0.97


def _metal_ions_on_the_grid(ions, rr, geom):
    """The metal-bearing ions as the kernels see them: positions (float64), range index, which rows
    they are, and their lookup-grid cell and unit-cell indices (the kernels' float64 arithmetic)."""
    ca = assign_channels(ions["m"], rr.ranges, METALS)
    w = ca.metal_weights[:-1]
    ri = ca.range_index
    sel = (ri >= 0)
    sel[sel] = (w[ri[sel]] > 0).any(axis=1)
    x, y, z = (np.asarray(ions[c], np.float64)[sel] for c in "xyz")
    kg = geom.kernel_geometry()
    G, sh = int(kg.n_grid), int(kg.grid_bits)
    I = [np.floor(x * kg.cell_xy[r, 0] + y * kg.cell_xy[r, 1] + z * kg.cell_z[r] + kg.cell_origin[r]).astype(np.int64)
         for r in range(2)]
    cell = ((I[0] & (G - 1)) << sh) | (I[1] & (G - 1))
    return x, y, z, ri[sel], sel, cell, I[0] >> sh, I[1] >> sh


def _reference_evidence(ions, rr, geom, ev, bins=None):
    """numpy reference: grid cell of every ion as the kernels compute it (float64), its level, its
    range's (or mass bin's) increments, binned with ColumnBinner."""
    x, y, z, ri, sel, cell, _, _ = _metal_ions_on_the_grid(ions, rr, geom)
    row = ri if bins is None else bins.bin_of(ri, ions["m"][sel])
    inc = ev.increments[row * N_LEVELS + ev.cell_level[cell]]
    return ColumnBinner(geom, len(METALS)).add(x, y, z, inc).counts


def _passes_with_and_without_evidence(ions, rr, geom, ev):
    """The fused pass with the evidence table ``ev`` on one thread in large blocks and on two in
    small ones ((counts, evidence, tally) each), and the counts and tally of the pass without."""
    plan = make_count_plan(rr.ranges, METALS, np.ones(2), geom, 5, evidence=ev)
    plain = make_count_plan(rr.ranges, METALS, np.ones(2), geom, 5)
    x, y, z, m = (np.asarray(ions[c], np.float64) for c in "xyzm")
    out = []
    for threads, block in ((1, 50_000), (2, 7_001)):
        with CountPass(plan, threads=threads) as cp:
            for s in range(0, x.size, block):
                cp.add(s, x[s:s + block], y[s:s + block], z[s:s + block], m[s:s + block])
            tally, _ = cp.result()
            out.append((cp.counts.copy(), cp.evidence.copy(), tally.copy()))
    with CountPass(plain, threads=1) as cp:
        cp.add(0, x, y, z, m)
        t_plain, _ = cp.result()
        return out, cp.counts.copy(), t_plain


def test_fused_pass_fills_the_evidence_as_the_reference(run, fitted):  # noqa: F811
    rr, _, geom = fitted
    ions = as_dict(run.ions)
    w, _, _ = _weights_for(rr.ranges, METALS)
    ev = evidence_table(np.asarray(w[:-1]), [1.0, 1.0], [1.0, 1.0], geom.locator,
                        LateralSpread(0.15, 0.9, 1000, True))
    out, c_plain, t_plain = _passes_with_and_without_evidence(ions, rr, geom, ev)
    # the counts and tallies are those of the pass without evidence; the evidence is exact
    for c, e, t in out:
        np.testing.assert_array_equal(c, c_plain)
        np.testing.assert_array_equal(t, t_plain)
        np.testing.assert_array_equal(e, out[0][1])
    ref = _reference_evidence(ions, rr, geom, ev)
    np.testing.assert_allclose(out[0][1], ref, atol=1e-5)
    assert out[0][1].sum() > 0


def _random_bins(rr, rng):
    """Mass bins of every metal range (2 to 11 each) with random shares: a table the pass must read
    by mass bin."""
    w = np.asarray(_weights_for(rr.ranges, METALS)[0][:-1])
    n = np.where((w > 0).any(axis=1), rng.integers(2, 12, w.shape[0]), 1)
    start = np.concatenate([[0], np.cumsum(n)]).astype(np.int64)
    lows, highs = rr.ranges.lows_da, rr.ranges.highs_da
    share = np.where((w > 0)[np.repeat(np.arange(n.size), n)], rng.random((int(start[-1]), len(METALS))), 0.0)
    return RangeBins(start=start, scale=np.where(n > 1, n / (highs - lows), 0.0), lows=np.asarray(lows, float),
                     share=share, metal_split=np.ones_like(share), range_share=w)


def test_fused_pass_reads_the_mass_bins_exactly(run, fitted):  # noqa: F811
    rr, _, geom = fitted
    ions = as_dict(run.ions)
    bins = _random_bins(rr, np.random.default_rng(6))
    ev = evidence_table(bins.share, [1.0, 1.0], [1.0, 1.0], geom.locator, LateralSpread(0.15, 0.9, 1000, True),
                        bins=bins)
    assert ev.increments.shape == (bins.n_bins * N_LEVELS, 2)
    plan = make_count_plan(rr.ranges, METALS, np.ones(2), geom, 5, evidence=ev)
    x, y, z, m = (np.asarray(ions[c], np.float64) for c in "xyzm")
    out = []
    for threads, block in ((1, x.size), (2, 7_001), (2, 140_001)):
        with CountPass(plan, threads=threads) as cp:
            for s in range(0, x.size, block):
                cp.add(s, x[s:s + block], y[s:s + block], z[s:s + block], m[s:s + block])
            cp.result()
            out.append(cp.evidence.copy())
    for e in out[1:]:
        np.testing.assert_array_equal(e, out[0])  # exact whatever the threads and blocks
    np.testing.assert_array_equal(out[0] * UNITS, np.rint(out[0] * UNITS))
    ref = _reference_evidence(ions, rr, geom, ev, bins)
    np.testing.assert_allclose(out[0], ref, atol=1e-5)
    # the bins matter: reading the first bin of every range gives another array
    first = dataclasses.replace(bins, scale=np.zeros_like(bins.scale))
    assert np.abs(_reference_evidence(ions, rr, geom, ev, first) - out[0]).max() > 0.5
    # float32 mass-to-charge: the pass converts m to float64 before the bin arithmetic, as bin_of does
    m32 = np.asarray(ions["m"], np.float32)
    with CountPass(plan, threads=1) as cp:
        cp.add(0, x, y, z, m32)
        cp.result()
        e32 = cp.evidence.copy()
    np.testing.assert_allclose(e32, _reference_evidence(dict(ions, m=m32), rr, geom, ev, bins), atol=1e-5)


def test_own_ions_come_out_of_every_bin_alike():
    # per bin the extras' share is (1 - c) s_b / (1 - c s_b); over the bins, weighted by the extras in
    # them, it gives the range's extras' share: the bins only move the evidence within the range
    rng = np.random.default_rng(3)
    s_b = np.column_stack([rng.uniform(0.05, 0.9, 12), np.zeros(12)])
    n_b = rng.uniform(10, 500, 12)
    s_r = np.array([[(n_b * s_b[:, 0]).sum() / n_b.sum(), 0.0]])
    for c in (0.0, 0.4, 0.9):
        u_b = remove_own(s_b, np.full(12, c))
        u_r = remove_own(s_r, [c])
        extras = n_b * (1 - c * s_b[:, 0])
        assert (extras * u_b[:, 0]).sum() / extras.sum() == pytest.approx(u_r[0, 0], rel=1e-12)
    assert remove_own(s_b, np.zeros(12)) == pytest.approx(s_b)  # no own ions: the spectrum's shares


def test_extras_shares_per_bin_use_their_range_own_fraction(fitted):  # noqa: F811
    _, _, geom = fitted
    rng = np.random.default_rng(2)
    sigma = 0.12
    d = np.concatenate([_gauss_distances(sigma, 3000, rng), _cell_points(geom.locator, 7000, rng)])
    share = np.array([[0.4, 0.0], [1.0, 0.0]])
    ri = np.zeros(d.size, int)
    spread = LateralSpread(sigma, 0.9, 1000, True)
    flat = one_bin_per_range(share)
    np.testing.assert_array_equal(extras_shares(share, d, ri, geom.locator, spread, bins=flat),
                                  extras_shares(share, d, ri, geom.locator, spread))
    # range 0 in three bins of shares 0.7, 0.4, 0.1: each bin loses the range's own fraction
    bins = RangeBins(start=np.array([0, 3, 4]), scale=np.array([30.0, 0.0]), lows=np.array([1.0, 2.0]),
                     share=np.array([[0.7, 0.0], [0.4, 0.0], [0.1, 0.0], [1.0, 0.0]]),
                     metal_split=np.ones((4, 2)), range_share=share)
    u = extras_shares(share, d, ri, geom.locator, spread, bins=bins)
    u_r = extras_shares(share, d, ri, geom.locator, spread)[0, 0]
    c_r = (0.4 - u_r) / (0.4 * (1 - u_r))  # from u = (1 - c) s / (1 - c s)
    np.testing.assert_allclose(u[:3, 0], (1 - c_r) * bins.share[:3, 0] / (1 - c_r * bins.share[:3, 0]), rtol=1e-12)
    assert u[0, 0] > u[1, 0] > u[2, 0] and u[3, 0] == 1.0


def test_own_scale_of_flat_bins_is_the_ranges(run, fitted):  # noqa: F811
    # cutting a range into bins that all carry the range's share changes nothing the decoder reads
    rr, _, geom = fitted
    ions = run.ions
    ca = assign_channels(ions.mass_to_charge, rr.ranges, METALS)
    sel = (ca.metal_weights[:-1].sum(1) > 0)[ca.range_index] & (ca.range_index >= 0)
    d = geom.registration.axis_distance_nm(ions.x[sel], ions.y[sel], ions.z[sel])
    w = np.asarray(ca.metal_weights)[:-1]
    one = run_evidence_table(rr, ca, d, ca.range_index[sel], geom.locator, bins=one_bin_per_range(w))
    n = np.where((w > 0).any(axis=1), 4, 1)
    start = np.concatenate([[0], np.cumsum(n)]).astype(np.int64)
    lows, highs = rr.ranges.lows_da, rr.ranges.highs_da
    rep = np.repeat(np.arange(n.size), n)
    split = np.where(n[rep, None] > 1, 1.0 / n[rep, None], 1.0) * np.ones((1, w.shape[1]))
    flat = RangeBins(start=start, scale=np.where(n > 1, n / (highs - lows), 0.0), lows=np.asarray(lows, float),
                     share=w[rep], metal_split=split, range_share=w)
    cut = run_evidence_table(rr, ca, d, ca.range_index[sel], geom.locator, bins=flat)
    np.testing.assert_allclose(cut.own_scale, one.own_scale, rtol=1e-12)
    np.testing.assert_array_equal(cut.capture, one.capture)
    np.testing.assert_array_equal(cut.increments.reshape(-1, N_LEVELS, 2), one.increments.reshape(-1, N_LEVELS, 2)[rep])


def _brute_state_loglik(ev, mask, p):
    """log sum over state sequences of prod_t factor_t(s_t) times the chain, the factor read
    linearly: 1 - eta a_k + eta a_k E_k / mu_k (the model of probeseq.lattice.evidence)."""
    T, K = ev.shape
    f = p.stationary
    e = p.eta * p.visibility
    tot = 0.0
    for seq in itertools.product(range(K), repeat=T):
        lp = math.log(f[seq[0]]) + sum(math.log(p.transmat[seq[t - 1], seq[t]]) for t in range(1, T))
        for t in range(T):
            if mask[t]:
                k = seq[t]
                lp += math.log(1 - e[k] + e[k] * ev[t, k] / p.extra_rate[k])
        tot += math.exp(lp)
    return math.log(tot)


@pytest.mark.filterwarnings("ignore::probeseq.exceptions.DataQualityWarning")  # a tiny rod has few counts
def test_decoder_reads_soft_evidence_linearly():
    evid = np.array([[[0.0, 2.7], [0.4, 0.0], [0.0, 0.0], [1.3, 0.2], [0.0, 0.0], [5.1, 0.0]]])
    counts = np.rint(evid)
    mask = np.array([[True, True, False, True, True, True]])
    cols = make_columns(counts, mask)
    import dataclasses

    cols = dataclasses.replace(cols, evidence=evid, params={"evidence": {"own_scale": {"Co": 2.0, "Zn": 2.0}}})
    base = dict(eta=0.6, extra_rate=np.array([0.3, 0.5]), visibility=[0.9, 0.8])
    p1 = DecoderParams(transmat=[[0.8, 0.2], [0.3, 0.7]], **base)
    p2 = DecoderParams(transmat=[[0.5, 0.5], [0.5, 0.5]], **base)
    r1, r2 = decode(cols, p1), decode(cols, p2)
    # the state-independent part is the same for both: the difference is the linear factors'
    assert r1.loglik - r2.loglik == pytest.approx(
        _brute_state_loglik(evid[0], mask[0], p1) - _brute_state_loglik(evid[0], mask[0], p2), rel=1e-9)
    # and the counts alone give another answer (the split-ion reading of fractions is not used)
    plain = decode(make_columns(evid, mask), p1)
    assert plain.loglik != pytest.approx(r1.loglik, rel=1e-6)


class _LinearEvidenceReference:
    """The soft-evidence emission written out for hmmlearn 0.3.3 (its documented
    ``_compute_log_likelihood`` hook, as hmmlearn's own StubHMM test does): log(1 - eta a_k +
    eta a_k E_k / mu_k) per state; the last column of X flags observed sites."""

    @staticmethod
    def make(params):
        base = pytest.importorskip("hmmlearn.base")  # source: hmmlearn 0.3.3

        class Ref(base.BaseHMM):
            def __init__(self):
                super().__init__(n_components=params.n_metals, init_params="", params="")
                self.startprob_ = params.stationary
                self.transmat_ = params.transmat

            def _compute_log_likelihood(self, X):
                e, obs = X[:, :-1], X[:, -1] > 0
                ek = params.eta * params.visibility
                out = np.log(1 - ek + ek * e / params.extra_rate)
                out[~obs] = 0.0
                return out

        return Ref()


@pytest.mark.filterwarnings("ignore::probeseq.exceptions.DataQualityWarning")
def test_soft_evidence_posteriors_match_hmmlearn():
    import dataclasses

    rng = np.random.default_rng(4)
    n_rods, n_sites = 6, 80
    evid = np.where(rng.random((n_rods, n_sites, 3)) < 0.3, np.rint(rng.gamma(2.0, 1.0, (n_rods, n_sites, 3)) * 64) / 64,
                    0.0)
    mask = rng.random((n_rods, n_sites)) > 0.1
    cols = make_columns(np.rint(evid), mask)
    cols = dataclasses.replace(cols, evidence=evid, params={"evidence": {"own_scale": {m: 2.0 for m in cols.metals}}})
    p = DecoderParams(transmat=[[0.7, 0.2, 0.1], [0.15, 0.7, 0.15], [0.1, 0.3, 0.6]], eta=0.55,
                      extra_rate=np.array([0.2, 0.3, 0.25]), visibility=[0.8, 1.0, 0.9])
    res = decode(cols, p)
    ref = _LinearEvidenceReference.make(p)
    for r in range(n_rods):
        obs = np.flatnonzero(mask[r])
        t0, t1 = obs.min(), obs.max() + 1  # the rod's span: leading and trailing masked sites dropped
        X = np.column_stack([evid[r, t0:t1], mask[r, t0:t1].astype(float)])
        _, post = ref.score_samples(X)
        np.testing.assert_allclose(res.posteriors[r, t0:t1][mask[r, t0:t1]], post[mask[r, t0:t1]], atol=2e-6)
        path = ref.decode(X, algorithm="viterbi")[1]
        np.testing.assert_array_equal(res.viterbi[r, t0:t1][mask[r, t0:t1]], path[mask[r, t0:t1]])


def test_analyze_decodes_soft_evidence_by_default_and_drawn_metals_on_request(tmp_path, run):  # noqa: F811
    import json

    from probeseq.cli import main

    paths = run.write(tmp_path / "run.csv")
    common = [str(paths["ions"]), "--metals", ",".join(METALS), "--lattice", str(paths["lattice"]), "--n-boot", "20",
              "-q"]
    assert main(["analyze", *common, "--out", str(tmp_path / "soft")]) == 0
    assert main(["analyze", *common, "--out", str(tmp_path / "drawn"), "--drawn-metals"]) == 0
    soft = json.loads((tmp_path / "soft" / "results.json").read_text())
    drawn = json.loads((tmp_path / "drawn" / "results.json").read_text())
    assert soft["decoding"]["soft_evidence"] is True and drawn["decoding"]["soft_evidence"] is False
    assert soft["decoding"]["eta_of_soft_evidence_fit"] is not None and drawn["decoding"]["eta_of_soft_evidence_fit"] is None
    # the chain and the efficiency come from the counts either way: the same fit
    assert soft["decoding"]["eta"] == pytest.approx(drawn["decoding"]["eta"], abs=1e-12)
    from probeseq.lattice.rodcolumns import load_columns

    cs, cd = load_columns(tmp_path / "soft" / "columns.h5"), load_columns(tmp_path / "drawn" / "columns.h5")
    assert cs.evidence is not None and cd.evidence is None
    np.testing.assert_array_equal(cs.counts, cd.counts)  # whole ions either way


@pytest.mark.parametrize("packing,a,sigma", [("honeycomb", 2.6, 0.2), ("honeycomb", 2.6, 0.1), ("square", 1.2, 0.2)])
def test_lateral_capture_is_the_share_of_own_ions_nearest_their_rod(packing, a, sigma):
    """Against a Monte Carlo of the own ions: points drawn from the 2-D Gaussian about each rod of
    the unit cell, assigned to their nearest rod by brute force (no table); the share that lands
    nearest its own rod within the cutoff is the lateral capture."""
    from probeseq.lattice.evidence import lateral_capture
    from probeseq.lattice.locator import RodLocator
    from probeseq.lattice.model import Lattice

    lat = Lattice.from_preset(packing, a, 0.68)
    loc = RodLocator.build(lat, 0.75 * lat.nearest_rod_distance_nm, 256)
    spread = LateralSpread(sigma, 0.99, 1000, True)
    rng = np.random.default_rng(3)
    C = lat.cell_matrix
    n = 200_000
    kept = 0
    for b in range(lat.rods_per_cell):
        off = rng.normal(0.0, sigma, (n, 2)) @ np.linalg.inv(C).T  # nm -> fractional
        f = lat.rods_frac[b] + off
        ci, cj, code, d2 = loc.nearest_exact(f[:, 0], f[:, 1])
        pos = np.column_stack([ci, cj]) + loc.code_frac[code]
        own = np.all(np.abs(pos - lat.rods_frac[b]) < 1e-9, axis=1) & (d2 < loc.cutoff_nm ** 2)
        kept += int(own.sum())
    mc = kept / (n * lat.rods_per_cell)
    got = lateral_capture(loc, spread)
    assert got == pytest.approx(mc, abs=3e-3)  # the Monte Carlo's own error is about 5e-4
    # nothing is lost without a fitted width
    assert lateral_capture(loc, dataclasses.replace(spread, fitted=False)) == 1.0


def test_a_metal_without_extras_keeps_the_same_least_share_in_ranges_and_in_the_decode():
    # The decode weighs a range shared with fragments against a pure range of the metal by u_r / mu:
    # both floors stand for the same least share of the metal's ions taken as extras, so with no
    # extras at all (c = 1; evidence of own ions only) the shared range keeps EXTRAS_LEAST_SHARE of
    # the metal's share among the extras and the extras' evidence per site is EXTRAS_LEAST_SHARE of
    # the mean evidence. A change of either floor alone breaks this.
    from probeseq.decoding.model import DecoderParams, _rod_data
    from probeseq.decoding.starts import evidence_start
    from probeseq.lattice.evidence import EXTRAS_LEAST_SHARE

    s = np.array([[0.3, 0.0], [0.0, 1.0]])
    u = remove_own(s, np.ones(2))
    assert u[0, 0] == pytest.approx(EXTRAS_LEAST_SHARE * 0.3 / 0.7, rel=1e-12)
    assert u[1, 1] == pytest.approx(1.0)  # a pure range keeps its whole share whatever the floor
    rng = np.random.default_rng(5)
    state = rng.integers(0, 2, size=(40, 50))
    eta = 0.6
    detected = rng.random((40, 50)) < eta
    ev = np.zeros((40, 50, 2))
    ev[detected, state[detected]] = 1.0  # own ions only, evidence 1 each
    data = _rod_data(ev, np.ones((40, 50), bool), own_scale=np.ones(2))
    # the chain and efficiency of the counts' fit, with the composition and eta of the sample
    f = np.bincount(state.ravel(), minlength=2) / state.size
    p = DecoderParams(transmat=np.tile(f, (2, 1)), eta=float(detected.mean()), extra_rate=np.full(2, 0.01))
    mu = evidence_start(data, p, None).extra_rate
    mean = ev.reshape(-1, 2).mean(axis=0)
    assert mu == pytest.approx(EXTRAS_LEAST_SHARE * mean, rel=1e-9)


def _shared_reference(ions, rr, geom, ev):
    """The shared evidence of the metal-bearing ions, recomputed outside the pass: at the nearest
    rod as :func:`_reference_evidence`, and at the second nearest rod's same site from the table's
    codes of the grid cell (exchanged where the exact nearest rod is the cell centre's second)."""
    from probeseq.lattice.counting import _FB, _FB_LIMIT
    from probeseq.lattice.locator import nearest_candidate

    x, y, z, row, _, cell, ci, cj = _metal_ions_on_the_grid(ions, rr, geom)
    kg = geom.kernel_geometry()
    lv1, lv2 = ev.cell_level[cell].astype(np.int64), ev.second_level[cell].astype(np.int64)
    c2 = ev.second_code[cell].astype(np.int64)
    for q in np.flatnonzero(kg.lut_offset[cell] < _FB_LIMIT):  # exact nearest in the cells on an edge
        f1 = kg.frac_xy[0, 0] * x[q] + kg.frac_xy[0, 1] * y[q] + kg.frac_z[0] * z[q] + kg.frac_origin[0]
        f2 = kg.frac_xy[1, 0] * x[q] + kg.frac_xy[1, 1] * y[q] + kg.frac_z[1] * z[q] + kg.frac_origin[1]
        code = nearest_candidate(kg.candidates, kg.lut_offset[cell[q]] - _FB, f1 - ci[q], f2 - cj[q], kg.code_frac,
                                 kg.metric, kg.cutoff2_nm2)
        if code >= 0 and code == c2[q]:
            c2[q] = ev.first_code[cell[q]]
            lv1[q], lv2[q] = lv2[q], lv1[q]
    inc1 = ev.increments[row * N_LEVELS + lv1]
    ref = ColumnBinner(geom, len(METALS)).add(x, y, z, inc1).counts
    rod1, site = assign_rods(x, y, z, geom)
    ni, nj, nb = int(kg.n_cells_i), int(kg.n_cells_j), int(kg.rods_per_cell)
    rod2 = kg.rod_key[np.clip(ci, 2, ni - 3) * (nj * nb) + np.clip(cj, 2, nj - 3) * nb + kg.code_offset[c2]]
    ok = (rod1 >= 0) & (site >= 0) & (rod2 >= 0) & (lv2 > 0)
    np.add.at(ref, (rod2[ok], site[ok]), ev.increments[row[ok] * N_LEVELS + lv2[ok]])
    return ref, int(ok.sum())


def test_shared_evidence_goes_to_the_two_nearest_rods_as_the_reference(run, fitted):  # noqa: F811
    rr, _, geom = fitted
    ions = as_dict(run.ions)
    w, _, _ = _weights_for(rr.ranges, METALS)
    ev = evidence_table(np.asarray(w[:-1]), [1.0, 1.0], [1.0, 1.0], geom.locator,
                        LateralSpread(0.3, 0.9, 1000, True), shared=True)
    assert ev.shared and (ev.second_level > 0).any()
    out, c_plain, t_plain = _passes_with_and_without_evidence(ions, rr, geom, ev)
    for c, e, t in out:  # sharing adds evidence, never a count
        np.testing.assert_array_equal(c, c_plain)
        np.testing.assert_array_equal(t, t_plain)
        np.testing.assert_array_equal(e, out[0][1])
    ref, n_second = _shared_reference(ions, rr, geom, ev)
    assert n_second > 1000
    np.testing.assert_allclose(out[0][1], ref, atol=1e-5)


def test_shared_ratios_split_an_ion_between_rods_at_the_midpoint_and_keep_the_own_evidence():
    # at the midpoint of two rods the two ratios are equal; near an axis the ratio at the far rod
    # is small; the own evidence counts what an own ion adds at its rod as nearest and as second
    from probeseq.lattice.evidence import _near_d2, shared_ratios
    from probeseq.lattice.locator import RodLocator
    from probeseq.lattice.model import Lattice

    lat = Lattice.from_preset("honeycomb", 1.5, 0.68)
    loc = RodLocator.build(lat, 0.75 * lat.nearest_rod_distance_nm, 256)
    spread = LateralSpread(0.2, 0.8, 1000, True)
    rho1, rho2, codes, e_own = shared_ratios(loc, spread)
    near = _near_d2(loc)
    inside = rho1 > 0
    mid = inside & (np.abs(np.sqrt(near[:, 0]) - np.sqrt(near[:, 1])) < 0.005)
    close = inside & (near[:, 0] < 0.01)
    assert mid.any() and close.any()
    np.testing.assert_allclose(rho1[mid], rho2[mid], rtol=0.1)
    assert (rho2[close] < 0.2 * rho1[close]).all()
    nearer = inside & (near[:, 1] - near[:, 0] > 1e-6)
    assert (rho1[nearer] >= rho2[nearer]).all()  # the nearer rod never gets the smaller share
    assert ((rho1 + rho2)[inside]).mean() == pytest.approx(1.0)
    assert (codes[:, 0] != codes[:, 1]).all()
    # e_own against a Monte Carlo of own ions about each rod of the unit cell: an ion adds rho1 of
    # its grid cell where its own rod is its nearest, rho2 where it is the second nearest
    rng = np.random.default_rng(9)
    G, C = int(loc.n_grid), lat.cell_matrix
    frac, g = np.asarray(loc.code_frac), np.asarray(loc.metric)
    got = []
    for b in range(lat.rods_per_cell):
        f = lat.rods_frac[b] + rng.normal(0.0, 0.2, (40_000, 2)) @ np.linalg.inv(C).T
        cell_ij = np.floor(f)
        u = f - cell_ij
        du, dv = u[:, None, 0] - frac[None, :, 0], u[:, None, 1] - frac[None, :, 1]
        order = np.argsort(g[0, 0] * du * du + 2 * g[0, 1] * du * dv + g[1, 1] * dv * dv, axis=1)[:, :2]
        own = np.all(np.abs(frac[None, :, :] - (lat.rods_frac[b] - cell_ij)[:, None, :]) < 1e-9, axis=2).argmax(1)
        gi = np.minimum((u * G).astype(np.int64), G - 1)
        gcell = gi[:, 0] * G + gi[:, 1]
        got.append(np.where(order[:, 0] == own, rho1[gcell], np.where(order[:, 1] == own, rho2[gcell], 0.0)))
    assert e_own == pytest.approx(np.concatenate(got).mean(), rel=0.02)
