"""Tests of the groups-of-rods analysis on synthetic rods with known correlations."""

import dataclasses
import json
import math

import numpy as np
import pytest

from probeseq.decoding.groups import analyze_groups, tile_groups
from probeseq.exceptions import DataQualityWarning, InputError
from probeseq.lattice.rodcolumns import RodColumns


def _markov(n_rods, n_sites, lam, comp, rng):
    """Chains with P(stay) = lam + (1 - lam) f_k: A = lam I + (1 - lam) 1 f."""
    comp = np.asarray(comp)
    s = np.empty((n_rods, n_sites), dtype=int)
    s[:, 0] = rng.choice(comp.size, n_rods, p=comp)
    for t in range(1, n_sites):
        fresh = rng.choice(comp.size, n_rods, p=comp)
        s[:, t] = np.where(rng.random(n_rods) < lam, s[:, t - 1], fresh)
    return s


def make_rods(pattern, side=20, n_sites=200, eta=0.5, lam=0.8, comp=(0.6, 0.4), copy_error=0.1,
              crosstalk=0.0, extra=0.05, seed=0):
    """Square grid of rods (1 nm apart); own ion Bernoulli(eta), a detected ion lands in a
    random nearest-neighbour rod with probability `crosstalk`; Poisson extras of mean `extra`."""
    rng = np.random.default_rng(seed)
    comp = np.asarray(comp)
    k, n_rods = comp.size, side * side
    if pattern == "random":
        s = _markov(n_rods, n_sites, 0.0, comp, rng)
    elif pattern == "block":
        s = _markov(n_rods, n_sites, lam, comp, rng)
    else:  # copied: every rod copies one chain; a site is redrawn with probability copy_error
        s = np.tile(_markov(1, n_sites, lam, comp, rng)[0], (n_rods, 1))
        err = rng.random(s.shape) < copy_error
        s[err] = rng.choice(k, err.sum(), p=comp)
    counts = rng.poisson(extra * comp, size=(n_rods, n_sites, k)).astype(float)
    r, t = np.nonzero(rng.random((n_rods, n_sites)) < eta)
    ix, iy = np.divmod(r, side)
    move = rng.random(r.size) < crosstalk
    step = np.array([(1, 0), (-1, 0), (0, 1), (0, -1)])[rng.integers(0, 4, r.size)]
    jx = np.clip(ix + move * step[:, 0], 0, side - 1)
    jy = np.clip(iy + move * step[:, 1], 0, side - 1)
    np.add.at(counts, (jx * side + jy, t, s[r, t]), 1.0)
    xy = np.stack(np.divmod(np.arange(n_rods), side), axis=1).astype(float)
    right = [(i, i + 1) for i in range(n_rods) if (i + 1) % side]
    down = [(i, i + side) for i in range(n_rods - side)]
    cols = RodColumns(
        counts=counts, mask=np.ones((n_rods, n_sites), bool), metals=("Co", "Zn", "Ni")[:k], rod_xy_nm=xy,
        tilt=np.zeros(2), z_ref_nm=0.0, site_z_nm=np.arange(n_sites) * 0.25, pitch_nm=0.25,
        neighbours=np.array(right + down), resolvable=crosstalk < 0.1,
    )
    return cols, s


def _replace(cols, **kw):
    return dataclasses.replace(cols, **kw)


def test_independent_rods_fall_as_one_over_n():
    cols, _ = make_rods("random", seed=1)
    g = analyze_groups(cols, random_state=0)
    assert abs(g.rho) < 0.03 and abs(g.rho_neighbours) < 0.03
    np.testing.assert_allclose(g.variance, g.variance_independent, rtol=0.15)
    assert g.sigma2 == pytest.approx(g.sigma2_expected, rel=0.05)
    assert g.persistence == 0.0 and g.correlation_length_sites == 0.0
    # the detection-noise term is essential: without it single rods look twice as variable
    assert g.variance_raw[0] > 1.5 * g.sigma2_expected
    assert abs(g.eta - 0.5) < 0.03


def test_copied_rods_keep_their_variance():
    cols, _ = make_rods("copied", copy_error=0.1, seed=2)
    g = analyze_groups(cols, random_state=0)
    # each rod keeps the shared chain with probability 0.9, so cov = 0.9^2 var (common practice)
    assert g.rho == pytest.approx(0.81, abs=0.06)
    assert g.rho_neighbours == pytest.approx(0.81, abs=0.06)
    assert g.variance[-1] > 0.7 * g.variance[0]
    ratio = g.variance / g.variance_independent
    assert np.all(np.diff(ratio) > 0) and ratio[-1] > 10


def test_along_rod_correlation_length():
    cols, _ = make_rods("block", lam=0.8, seed=3)
    g = analyze_groups(cols, random_state=0)
    # A = lam I + (1 - lam) 1 f has every non-unit eigenvalue lam, so C(k) = C(0) lam^k and the
    # e-folding length is -1/ln(lam) = 4.48 sites (linear algebra of the chain, recalled from memory)
    assert g.persistence == pytest.approx(0.8, abs=0.04)
    assert g.correlation_length_sites == pytest.approx(-1 / math.log(0.8), rel=0.2)
    assert g.correlation_length_nm == pytest.approx(g.correlation_length_sites * 0.25)
    np.testing.assert_allclose(g.autocorrelation[0, 1:4], 0.8 ** np.arange(1, 4), atol=0.05)
    assert abs(g.rho) < 0.03


def test_three_metals_and_high_efficiency():
    cols, _ = make_rods("block", lam=0.6, comp=(0.5, 0.3, 0.2), eta=0.8, seed=4)
    g = analyze_groups(cols, group_sizes=[1, 2, 4, 8, 16], random_state=0)
    assert abs(g.eta - 0.8) < 0.03
    assert g.sigma2 == pytest.approx(1 - 0.25 - 0.09 - 0.04, rel=0.05)
    assert g.persistence == pytest.approx(0.6, abs=0.05)
    np.testing.assert_array_equal(g.group_sizes, [1, 2, 4, 8, 16])


def test_unresolvable_rods_still_separate_independent_from_copied():
    ind, _ = make_rods("random", crosstalk=0.3, seed=5)
    cop, _ = make_rods("copied", crosstalk=0.3, seed=6)
    gi = analyze_groups(ind, random_state=0)
    gc = analyze_groups(cop, random_state=0)
    assert abs(gi.rho) < 0.06
    assert gc.rho > 0.6


def test_tile_groups_partition():
    rng = np.random.default_rng(0)
    xy = rng.uniform(0, 30, size=(500, 2))
    for n in (1, 4, 16):
        lab = tile_groups(xy, n, random_state=1)
        used = lab[lab >= 0]
        sizes = np.bincount(used)
        assert sizes.min() >= math.ceil(n / 2)
        assert 0.6 * n <= sizes.mean() <= 1.5 * n
        assert used.size >= 0.8 * len(xy)
    np.testing.assert_array_equal(tile_groups(xy, 1), np.arange(500))


def test_to_dict_is_json():
    cols, _ = make_rods("block", side=10, n_sites=80, seed=7)
    d = analyze_groups(cols, random_state=0).to_dict()
    json.dumps(d)
    assert d["group_sizes"][0] == 1 and len(d["autocorrelation"]) == len(d["group_sizes"])


def test_bad_input():
    cols, _ = make_rods("random", side=10, n_sites=50, seed=8)
    with pytest.raises(InputError, match="all 5000 sites are masked"):
        analyze_groups(_replace(cols, mask=np.zeros_like(cols.mask)))
    with pytest.raises(InputError, match="at least 4 rods"):
        analyze_groups(RodColumns(counts=cols.counts[:3], mask=cols.mask[:3], metals=cols.metals,
                                  rod_xy_nm=cols.rod_xy_nm[:3], tilt=np.zeros(2), z_ref_nm=0.0,
                                  site_z_nm=cols.site_z_nm, pitch_nm=0.25))
    one = cols.counts.copy()
    one[:, :, 1] = 0
    with pytest.raises(InputError, match="two metal channels"):
        analyze_groups(_replace(cols, counts=one))
    with pytest.raises(InputError, match="group_sizes"):
        analyze_groups(cols, group_sizes=[0, 2])
    with pytest.raises(InputError, match="at least two group sizes"):
        analyze_groups(cols, group_sizes=[100, 200])


def test_over_dispersed_totals_warn():
    cols, _ = make_rods("random", side=10, n_sites=60, seed=9)
    doubled = cols.counts * 3.0  # every ion counted three times: variance above the mean
    with pytest.warns(DataQualityWarning, match="over-dispersed"):
        g = analyze_groups(_replace(cols, counts=doubled), random_state=0)
    assert any("over-dispersed" in w for w in g.warnings)
