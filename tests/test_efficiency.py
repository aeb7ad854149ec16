"""Detection efficiency that varies between rods: the radial fit (probeseq.decoding.efficiency)
and the per-rod efficiency h_r of the rod model (eta h_r, extra rates mu h_r) in the fit and the
decode, both engines."""

import itertools
import json

import numpy as np
import pytest
from scipy import stats
from test_decode import make_columns

from probeseq.decoding import efficiency, passes, rodchain
from probeseq.decoding.decode import decode, fit_decoder, sample_model
from probeseq.decoding.efficiency import MIN_RODS, eta_mstep, fit_radial_efficiency
from probeseq.decoding.hmm import run_em
from probeseq.decoding.independent import independent_step
from probeseq.decoding.model import (
    SCREEN_SEGMENT,
    DecoderParams,
    _prepare,
    _rod_data,
    _screen_data,
    _with_efficiency,
    emission_baseline,
    emission_factors,
)
from probeseq.exceptions import InputError
from probeseq.lattice.rodcolumns import RodColumns

A2 = np.array([[0.85, 0.15], [0.25, 0.75]])
P2 = DecoderParams(transmat=A2, eta=0.65, extra_rate=np.array([0.10, 0.06]))


# ------------------------------------------------------------------------------------------
# synthetic specimens with an outline
# ------------------------------------------------------------------------------------------


def _outline(z):
    """A conical specimen: radius 12 -> 20 nm over 40 nm of depth, centre drifting in x."""
    return 3.0 + 0.02 * z, -2.0 + 0.0 * z, 12.0 + 0.2 * z


def _radial_specimen(rng, slope=-0.5, n_sites=150, max_rods=None, rod_sd=0.0):
    """Rods on a hexagonal lattice (1.5 nm apart) inside the outline, sites 0.25 nm apart.

    Every site's counts are drawn with ``eta (1 + slope rho_n^2)`` and extra rates
    ``mu (1 + slope rho_n^2)``, ``rho_n`` the distance of the tilted rod axis from the outline
    centre at the site's depth over the outline radius there, times a factor of every rod drawn
    from N(1, rod_sd) (what else differs between rods). Returns the columns and rho_n
    (n_rods, n_sites) of every site.
    """
    i, j = np.meshgrid(np.arange(-16, 17), np.arange(-16, 17), indexing="ij")
    xy = np.stack([1.5 * (i + 0.5 * j), 1.5 * np.sqrt(3) / 2 * j], axis=-1).reshape(-1, 2) + [3.0, -2.0]
    tilt, z_ref = np.array([0.01, -0.005]), 5.0
    site_z = 1.0 + 0.25 * np.arange(n_sites)
    offset = 0.05 * (np.arange(len(xy)) % 3)
    z = site_z[None, :] + offset[:, None]
    ax = xy[:, None, 0] + tilt[0] * (z - z_ref)
    ay = xy[:, None, 1] + tilt[1] * (z - z_ref)
    cx, cy, rad = _outline(z)
    rho = np.hypot(ax - cx, ay - cy) / rad
    mask = rho < 0.92
    keep = mask.any(axis=1)
    if max_rods is not None:
        keep &= np.cumsum(keep) <= max_rods
    xy, offset, rho, mask = xy[keep], offset[keep], rho[keep], mask[keep]
    n_rods = len(xy)
    h = np.where(mask, 1.0 + slope * rho ** 2, 1.0)  # unobserved sites lie outside: any h
    h *= np.clip(1.0 + rod_sd * rng.standard_normal(n_rods), 0.5, 1.5)[:, None]
    states = (rng.random((n_rods, n_sites)) < P2.stationary[1]).astype(int)
    counts = rng.poisson(P2.extra_rate[None, None, :] * h[:, :, None]).astype(float)
    r, t = np.nonzero(rng.random((n_rods, n_sites)) < P2.eta * h)
    counts[r, t, states[r, t]] += 1.0
    zo = np.linspace(0.0, 40.0, 9)
    ocx, ocy, orad = _outline(zo)
    params = {"columns": {"outline": {"z_nm": zo.tolist(), "radius_nm": orad.tolist(),
                                      "center_nm": np.stack([ocx, ocy], axis=1).tolist()}}}
    cols = RodColumns(counts=counts, mask=mask, metals=("Co", "Zn"), rod_xy_nm=xy, tilt=tilt, z_ref_nm=z_ref,
                      site_z_nm=site_z, pitch_nm=0.25, params=params, site_z_offset_nm=offset)
    return cols, rho


# ------------------------------------------------------------------------------------------
# (a), (b) the radial fit
# ------------------------------------------------------------------------------------------


def test_radial_fit_recovers_the_slope_and_the_edge_to_axis_ratio():
    cols, rho = _radial_specimen(np.random.default_rng(1))
    fit = fit_radial_efficiency(cols)
    x = rho[cols.mask] ** 2
    c = x.mean()
    a_true = -0.5 / (1.0 - 0.5 * c)  # (1 - 0.5 x) / (1 - 0.5 c) = 1 + a (x - c)
    assert fit.applied and fit.reason is None and fit.outline_source == "columns"
    assert fit.c == pytest.approx(c, rel=1e-12)
    assert fit.n_rods == cols.n_rods >= MIN_RODS and fit.n_sites == cols.mask.sum()
    assert abs(fit.a - a_true) < 3 * fit.a_se and fit.a_se < 0.05
    assert fit.h_outline / fit.h_axis == pytest.approx(0.5, abs=0.06)
    assert fit.h_axis == pytest.approx(1.0 - a_true * c, abs=3 * fit.h_axis_se)
    # per rod: h at the rod's mean rho_n, close to the truth
    rho_rod = np.array([r[m].mean() for r, m in zip(rho, cols.mask)])
    np.testing.assert_allclose(fit.rod_rho, rho_rod, rtol=1e-12)
    assert fit.per_rod.dtype == np.float64 and fit.per_rod.shape == (cols.n_rods,)
    np.testing.assert_allclose(fit.per_rod, (1.0 - 0.5 * rho_rod ** 2) / (1.0 - 0.5 * c), atol=0.04)
    d = fit.to_dict()
    json.dumps(d)
    assert d["applied"] is True and d["outline_to_axis"] == pytest.approx(fit.h_outline / fit.h_axis)


def test_standard_error_of_the_slope_is_calibrated():
    # rods differ in their count level beyond the radial trend: the sites of a rod are not
    # independent, so the per-site least-squares error would be too small (SD of z about 1.7)
    z = []
    for seed in range(100):
        cols, rho = _radial_specimen(np.random.default_rng(100 + seed), slope=-0.3, n_sites=60, rod_sd=0.15)
        fit = fit_radial_efficiency(cols)
        c = (rho[cols.mask] ** 2).mean()
        z.append((fit.a - (-0.3 / (1.0 - 0.3 * c))) / fit.a_se)
    assert 0.75 < np.std(z) < 1.35 and abs(np.mean(z)) < 0.4


def test_radial_fit_without_outline_falls_back_to_the_rods():
    cols, _ = _radial_specimen(np.random.default_rng(2))
    bare = RodColumns(counts=cols.counts, mask=cols.mask, metals=cols.metals, rod_xy_nm=cols.rod_xy_nm,
                      tilt=cols.tilt, z_ref_nm=cols.z_ref_nm, site_z_nm=cols.site_z_nm, pitch_nm=cols.pitch_nm,
                      site_z_offset_nm=cols.site_z_offset_nm)
    fit = fit_radial_efficiency(bare)
    assert fit.outline_source == "rods" and fit.applied
    assert fit.a < 0 and fit.h_outline < fit.h_axis
    assert np.nanmax(fit.rod_rho) <= 1.0 + 1e-12


def test_flat_efficiency_is_not_applied():
    cols, _ = _radial_specimen(np.random.default_rng(3), slope=0.0)
    fit = fit_radial_efficiency(cols)
    assert not fit.applied and "no significant" in fit.reason
    assert abs(fit.a) <= 3 * fit.a_se
    np.testing.assert_array_equal(fit.per_rod, np.ones(cols.n_rods))
    res = fit_decoder(cols, n_starts=1, random_state=0)
    assert res.rod_efficiency is None and res.radial_efficiency.a == fit.a and not res.radial_efficiency.applied
    d = res.to_dict()
    json.dumps(d)
    assert d["radial_efficiency"]["applied"] is False and d["efficiency"]["per_rod"] is False


def test_few_rods_are_not_enough():
    cols, _ = _radial_specimen(np.random.default_rng(4), slope=-0.7, max_rods=MIN_RODS - 5)
    fit = fit_radial_efficiency(cols)
    assert fit.n_rods == MIN_RODS - 5 and not fit.applied and "rods" in fit.reason
    assert np.all(fit.per_rod == 1.0)


def test_fit_decoder_uses_the_radial_fit():
    cols, _ = _radial_specimen(np.random.default_rng(5))
    res = fit_decoder(cols, n_starts=1, random_state=0)
    assert res.radial_efficiency.applied and res.efficiency_source == "radial fit"
    np.testing.assert_array_equal(res.rod_efficiency, res.radial_efficiency.per_rod)
    # eta h_r with h = (1 - 0.5 rho^2) / (1 - 0.5 c): the eta of a rod with h = 1 is eta (1 - 0.5 c)
    assert res.eta == pytest.approx(P2.eta * (1 - 0.5 * res.radial_efficiency.c), abs=0.03)
    off = fit_decoder(cols, n_starts=1, random_state=0, radial_efficiency=False)
    assert off.rod_efficiency is None and off.radial_efficiency is None
    assert res.loglik > off.loglik + 50
    d = res.to_dict()
    json.dumps(d)
    assert d["efficiency"]["per_rod"] and d["efficiency"]["source"] == "radial fit"
    assert d["radial_efficiency"]["a"] == pytest.approx(res.radial_efficiency.a)


# ------------------------------------------------------------------------------------------
# (c) the M-step with a known per-rod efficiency
# ------------------------------------------------------------------------------------------


def _simulate_with_detections(rng, h, n_sites):
    """Markov states, detections Bernoulli(eta h_r), extras Poisson(mu h_r); with the detections."""
    n_rods = h.size
    states = np.empty((n_rods, n_sites), int)
    states[:, 0] = rng.random(n_rods) < P2.stationary[1]
    for t in range(1, n_sites):
        states[:, t] = rng.random(n_rods) < A2[states[:, t - 1], 1]
    det = rng.random((n_rods, n_sites)) < P2.eta * h[:, None]
    counts = rng.poisson(P2.extra_rate[None, None, :] * h[:, None, None], (n_rods, n_sites, 2)).astype(float)
    r, t = np.nonzero(det)
    counts[r, t, states[r, t]] += 1.0
    return counts, states, det


def _posterior_detections(res, counts, h):
    """Expected detected own ions per rod: sum_t sum_k gamma_tk (1 - (1 - eta h_r) / f_tk)."""
    fac = emission_factors(counts, res.params, h[:, None])
    return (res.posteriors * (1.0 - (1.0 - res.eta * h[:, None, None]) / fac)).sum(axis=(1, 2))


def test_fit_with_the_true_efficiency_recovers_eta_and_beats_a_uniform_one():
    h = np.linspace(0.3, 1.4, 120)
    counts, _, det = _simulate_with_detections(np.random.default_rng(0), h, 300)
    cols = make_columns(counts)
    with_h = fit_decoder(cols, random_state=0, rod_efficiency=h)
    flat = fit_decoder(cols, random_state=0, radial_efficiency=False)
    assert with_h.efficiency_source == "given"
    assert with_h.eta == pytest.approx(P2.eta, abs=0.02)
    np.testing.assert_allclose(with_h.extra_rate, P2.extra_rate, rtol=0.1)
    np.testing.assert_allclose(with_h.transmat, A2, atol=0.05)
    # with h = 1 the edge rods (h < 0.5) get the efficiency of an average rod: far too high
    edge = h < 0.5
    assert np.all(flat.eta - P2.eta * h[edge] > 0.15)
    assert np.max(np.abs(with_h.eta * h - P2.eta * h)) < 0.03
    # posterior expected detections per rod against the detections drawn
    err_h = np.abs(_posterior_detections(with_h, counts, h) - det.sum(axis=1)).mean()
    err_1 = np.abs(_posterior_detections(flat, counts, np.ones(h.size)) - det.sum(axis=1)).mean()
    assert err_h < 0.6 * err_1
    assert with_h.loglik > flat.loglik + 1000


def test_the_fit_is_a_stationary_point_of_the_likelihood():
    # the exact M-step: at convergence d loglik / d eta = d loglik / d mu_j = 0 (the first-order
    # ratio sum(detected) / sum(N_r h_r) would leave eta about 0.4 standard errors off here)
    h = np.random.default_rng(3).uniform(0.3, 1.4, 80)
    counts, _ = sample_model(P2, 80, 400, random_state=2, rod_efficiency=h)
    cols = make_columns(counts)
    res = fit_decoder(cols, random_state=0, rod_efficiency=h, tol=1e-12, max_iter=3000)
    assert res.converged

    def ll(eta=res.eta, mu=res.extra_rate):
        p = DecoderParams(transmat=res.transmat, eta=eta, extra_rate=mu)
        return decode(cols, p, rod_efficiency=h, engine="numpy").loglik

    d = 1e-5
    l0, lp, lm = ll(), ll(eta=res.eta + d), ll(eta=res.eta - d)
    grad, curv = (lp - lm) / (2 * d), (lp - 2 * l0 + lm) / d ** 2
    assert curv < 0 and abs(grad / curv) < 0.01 / np.sqrt(-curv)  # off by < 1 % of a standard error
    for j in range(2):
        e = np.zeros(2)
        e[j] = 1e-6
        lp, lm = ll(mu=res.extra_rate + e), ll(mu=res.extra_rate - e)
        grad, curv = (lp - lm) / 2e-6, (lp - 2 * l0 + lm) / 1e-12
        assert curv < 0 and abs(grad / curv) < 0.01 / np.sqrt(-curv)


def test_independent_sites_model_with_efficiency():
    # the independent-sites model is the chain whose every row is the composition: its
    # likelihood with h equals the decoder's, and its EM fixed point is stationary in eta
    h = np.random.default_rng(4).uniform(0.3, 1.4, 40)
    counts, _ = sample_model(P2, 40, 150, random_state=9, rod_efficiency=h)
    counts[counts > 1] -= 0.5  # split ions too
    mask = np.ones(counts.shape[:2], bool)
    mask[5, :20] = False
    cols = make_columns(counts, mask)
    steps = [independent_step(_with_efficiency(_rod_data(counts, mask), h)),
             independent_step(_with_efficiency(_prepare(counts, mask), h))]
    tr = run_em(steps[0], (np.array([0.5, 0.5]), 0.5, np.array([0.1, 0.1])), max_iter=5000, tol=1e-10)
    comp, eta, mu = tr.params

    def ll(e):
        p = DecoderParams(transmat=np.tile(comp, (2, 1)), eta=e, extra_rate=mu)
        return decode(cols, p, rod_efficiency=h, engine="numpy").loglik

    for step in steps:
        assert step(tr.params)[0] == pytest.approx(ll(eta), rel=1e-11)
    d = 1e-5
    grad, curv = (ll(eta + d) - ll(eta - d)) / (2 * d), (ll(eta + d) - 2 * ll(eta) + ll(eta - d)) / d ** 2
    assert curv < 0 and abs(grad / curv) < 0.01 / np.sqrt(-curv)


def test_eta_mstep_solves_the_score_equation():
    rng = np.random.default_rng(7)
    h = rng.uniform(0.2, 1.5, 50)
    n = rng.integers(50, 400, 50).astype(float)
    d = rng.binomial(n.astype(int), 0.6 * h).astype(float)
    eta = eta_mstep(h, n, d, (1e-4, 1 - 1e-4))
    assert np.sum(d / eta - (n - d) * h / (1 - eta * h)) == pytest.approx(0.0, abs=1e-8 * n.sum())
    assert eta_mstep(np.ones(50), n, d, (1e-4, 1 - 1e-4)) == pytest.approx(d.sum() / n.sum(), rel=1e-12)
    assert eta_mstep(h, n, n, (1e-4, 1 - 1e-4)) == pytest.approx((1 - 1e-4) / h.max())  # all detected


# ------------------------------------------------------------------------------------------
# (d) no efficiency, all ones and the code before it: the same numbers, bit for bit
# ------------------------------------------------------------------------------------------


def _pinned_case():
    a = np.array([[0.8, 0.15, 0.05], [0.1, 0.8, 0.1], [0.2, 0.1, 0.7]])
    p = DecoderParams(transmat=a, eta=0.55, extra_rate=np.array([0.12, 0.07, 0.04]))
    counts, _ = sample_model(p, 30, 120, random_state=5)
    rng = np.random.default_rng(6)
    nz = counts > 0
    counts[nz] -= 0.4 * (rng.random(nz.sum()) < 0.2)  # split ions at some sites
    mask = np.ones(counts.shape[:2], bool)
    mask[:, :3] = False
    mask[4, 50:60] = False
    mask[7] = False
    xy = np.stack(np.divmod(np.arange(30), 6), axis=1) * 1.5
    cols = RodColumns(counts=counts, mask=mask, metals=("Co", "Zn", "Ni"), rod_xy_nm=xy, tilt=np.zeros(2),
                      z_ref_nm=0.0, site_z_nm=np.arange(120) * 0.23, pitch_nm=0.23)
    return cols, p


#: the same case run by the code before the per-rod efficiency existed: the log-likelihoods, eta and
#: the posteriors' sums per metal (float64) and paths' counts per metal. They were pinned bit for bit
#: (hashes of the arrays) until a newer numpy moved eta by 2 ulp and a near-tie of one Viterbi step;
#: the bit-for-bit property that matters, no efficiency against all ones in the same run, is
#: asserted exactly above, and the comparison with the old code to 1e-9 (relative) here.
BEFORE_DECODE_LOGLIK = "-0x1.4e680b645b2c2p+12"
BEFORE_DECODE_POST = (1434.97382, 1341.32137, 606.70480)  # sums of the posteriors per metal
BEFORE_DECODE_PATH = (1528, 1416, 439)  # sites of each metal on the Viterbi paths
BEFORE_FIT = ("-0x1.4c386b0a12828p+12", "0x1.f7d76d02850a1p-2", "-0x1.5c0b0b555a70ap+12")
BEFORE_FIT_POST = (1439.63573, 1363.04824, 580.31604)


def _close(a, b, rel=1e-9):
    return a == pytest.approx(b, rel=rel)


@pytest.mark.parametrize("engine", ["compiled", "numpy"])
def test_decode_without_efficiency_is_unchanged(engine):
    cols, p = _pinned_case()
    none = decode(cols, p, engine=engine)
    ones = decode(cols, p, engine=engine, rod_efficiency=np.ones(cols.n_rods))
    assert none.rod_efficiency is None and ones.rod_efficiency is None
    assert none.loglik == ones.loglik
    np.testing.assert_array_equal(none.posteriors, ones.posteriors)
    np.testing.assert_array_equal(none.viterbi, ones.viterbi)
    np.testing.assert_array_equal(none.per_rod_transitions, ones.per_rod_transitions)
    assert _close(none.loglik, float.fromhex(BEFORE_DECODE_LOGLIK), 1e-12)
    np.testing.assert_allclose(none.posteriors.astype(np.float64).sum(axis=(0, 1)), BEFORE_DECODE_POST, rtol=1e-6)
    path = np.bincount(none.viterbi[none.mask], minlength=3)
    assert np.abs(path - np.array(BEFORE_DECODE_PATH)).max() <= 2  # a near-tie may flip a step


def test_fit_without_efficiency_is_unchanged():
    cols, _ = _pinned_case()
    default = fit_decoder(cols, n_starts=2, random_state=0)  # radial fit run, not significant
    off = fit_decoder(cols, n_starts=2, random_state=0, radial_efficiency=False)
    ones = fit_decoder(cols, n_starts=2, random_state=0, rod_efficiency=np.ones(cols.n_rods))
    assert not default.radial_efficiency.applied
    for res in (default, off, ones):
        assert res.rod_efficiency is None
        for got, want in zip((res.loglik, float(res.eta), res.loglik_indep), BEFORE_FIT):
            assert _close(got, float.fromhex(want), 1e-12)
        np.testing.assert_allclose(res.posteriors.astype(np.float64).sum(axis=(0, 1)), BEFORE_FIT_POST, rtol=1e-6)
        np.testing.assert_array_equal(res.loglik_history, off.loglik_history)
        np.testing.assert_array_equal(res.transmat, off.transmat)
    np.testing.assert_array_equal(
        rodchain.fit_pass(cols.counts, cols.mask, *rodchain.spans(cols.mask), 0.5, np.full(3, 0.1),
                          np.full((3, 3), 1 / 3), np.full(3, 1 / 3))[5],
        rodchain.fit_pass(cols.counts, cols.mask, *rodchain.spans(cols.mask), 0.5, np.full(3, 0.1),
                          np.full((3, 3), 1 / 3), np.full(3, 1 / 3), np.ones(cols.n_rods))[5])


# ------------------------------------------------------------------------------------------
# (e) the likelihood against brute force from the model formula
# ------------------------------------------------------------------------------------------


def _site_likelihood(x, k, eta, mu):
    """P(x | k) = (1 - eta) Pois(x; mu) + eta Pois(x - e_k; mu), split ion mixed over its channel."""
    def whole(n):
        own = n.copy()
        own[k] -= 1
        return (1 - eta) * stats.poisson.pmf(n, mu).prod() + eta * stats.poisson.pmf(own, mu).prod()

    n = np.floor(x + 1e-9)
    phi = x - n
    if not phi.any():
        return whole(n)
    pi = phi / max(1.0, phi.sum())
    return (1 - pi.sum()) * whole(n) + sum(pi[j] * whole(n + np.eye(len(x))[j]) for j in range(len(x)))


def _brute_force(counts, mask, params, h):
    """Log-likelihood and posterior marginals by summing over every state path of every rod."""
    a, f = params.transmat, params.stationary
    n_rods, n_sites, k = counts.shape
    ll, post = 0.0, np.zeros((n_rods, n_sites, k))
    for r in range(n_rods):
        eta, mu = params.eta * h[r], params.extra_rate * h[r]
        e = np.ones((n_sites, k))
        for t in np.flatnonzero(mask[r]):
            e[t] = [_site_likelihood(counts[r, t], j, eta, mu) for j in range(k)]
        total = 0.0
        for path in itertools.product(range(k), repeat=n_sites):
            w = f[path[0]] * e[0, path[0]]
            for t in range(1, n_sites):
                w *= a[path[t - 1], path[t]] * e[t, path[t]]
            total += w
            post[r, np.arange(n_sites), list(path)] += w
        post[r] /= total
        ll += np.log(total)
    post[~mask] = 0.0
    return ll, post


@pytest.mark.filterwarnings("ignore::probeseq.exceptions.DataQualityWarning")  # 12 sites: few counts
@pytest.mark.parametrize("engine", ["compiled", "numpy"])
def test_loglik_with_efficiency_equals_brute_force(engine):
    p = DecoderParams(transmat=np.array([[0.7, 0.3], [0.4, 0.6]]), eta=0.6, extra_rate=np.array([0.3, 0.5]))
    counts = np.array([[[1, 0], [0, 0], [2, 1], [0, 1], [1, 0], [0, 0]],
                       [[0, 0], [1, 0.6], [0, 1], [3, 0], [0.7, 0], [0, 2]]], dtype=float)
    mask = np.ones((2, 6), bool)
    mask[0, 3] = False  # a gap
    mask[1, 0] = False  # a leading masked site
    h = np.array([0.45, 1.3])
    cols = make_columns(counts, mask)
    ll, post = _brute_force(counts, mask, p, h)
    res = decode(cols, p, rod_efficiency=h, engine=engine)
    assert res.loglik == pytest.approx(ll, rel=1e-12)
    np.testing.assert_allclose(res.posteriors, post, atol=1e-6)
    flat = decode(cols, p, engine=engine)
    assert abs(flat.loglik - ll) > 1e-3  # the efficiency matters here (far beyond the tolerance above)
    # the reference emission functions with an efficiency: the same model
    for r in range(2):
        for t in np.flatnonzero(mask[r]):
            lik = np.exp(emission_baseline(counts[r, t], p.extra_rate, h[r])) * emission_factors(counts[r, t], p, h[r])
            want = [_site_likelihood(counts[r, t], j, p.eta * h[r], p.extra_rate * h[r]) for j in range(2)]
            np.testing.assert_allclose(lik, want, rtol=1e-12)


# ------------------------------------------------------------------------------------------
# both engines, screening and bad input
# ------------------------------------------------------------------------------------------


def test_engines_agree_with_efficiency():
    rng = np.random.default_rng(11)
    h = rng.uniform(0.4, 1.4, 26)
    counts, _ = sample_model(P2, 26, 220, random_state=12, rod_efficiency=h)
    nz = counts > 0
    counts[nz] -= 0.3 * (rng.random(nz.sum()) < 0.3)
    mask = np.ones(counts.shape[:2], bool)
    mask[:, :5] = False
    mask[3, 100:120] = False
    mask[9] = False
    cols = make_columns(counts, mask)
    fast = fit_decoder(cols, random_state=4, rod_efficiency=h)
    ref = fit_decoder(cols, random_state=4, rod_efficiency=h, engine="numpy")
    assert fast.n_iter == ref.n_iter
    assert fast.loglik == pytest.approx(ref.loglik, rel=1e-11)
    assert fast.loglik_indep == pytest.approx(ref.loglik_indep, rel=1e-11)
    assert fast.eta == pytest.approx(ref.eta, abs=1e-9)
    np.testing.assert_allclose(fast.extra_rate, ref.extra_rate, rtol=1e-8)
    np.testing.assert_allclose(fast.posteriors, ref.posteriors, atol=1e-6)
    np.testing.assert_array_equal(fast.viterbi, ref.viterbi)


def test_screening_segments_keep_their_rods_efficiency():
    n_sites = 2 * SCREEN_SEGMENT + 40  # long rods are cut into segments for screening
    h = np.linspace(0.5, 1.2, 6)
    counts, _ = sample_model(P2, 6, n_sites, random_state=1, rod_efficiency=h)
    mask = np.ones(counts.shape[:2], bool)
    mask[2] = False
    data = _with_efficiency(_rod_data(counts, mask), h)
    screen = _screen_data(data, 10 ** 6, SCREEN_SEGMENT, np.random.default_rng(0))
    n_seg = -(-n_sites // SCREEN_SEGMENT)
    assert screen.counts.shape[0] == 5 * n_seg
    np.testing.assert_array_equal(screen.eff.h_rows, np.repeat(h[data.rods], n_seg))
    np.testing.assert_array_equal(screen.counts[n_seg, :SCREEN_SEGMENT], counts[1, :SCREEN_SEGMENT])


def test_bad_rod_efficiency_is_rejected():
    counts, _ = sample_model(P2, 4, 30, random_state=1)
    cols = make_columns(counts)
    for bad in (np.ones(3), [1, 1, -1, 1], [1, np.nan, 1, 1], "x"):
        with pytest.raises(InputError, match="rod_efficiency"):
            decode(cols, P2, rod_efficiency=bad)
        with pytest.raises(InputError, match="rod_efficiency"):
            fit_decoder(cols, rod_efficiency=bad)
    with pytest.raises(InputError, match="below 1"):
        decode(cols, P2, rod_efficiency=[1, 1, 1.6, 1])  # eta h = 1.04


# ------------------------------------------------------------------------------------------
# (f) the compiled passes (probeseq.decoding.passes) against plain numpy, bit for bit
# ------------------------------------------------------------------------------------------


def _wild(rng, shape):
    """Positive floats over 60 binary orders of magnitude: the order of a sum shows in its bits."""
    return rng.random(shape) * 2.0 ** rng.integers(-30, 30, shape)


@pytest.mark.parametrize("n", [0, 1, 7, 8, 9, 127, 128, 129, 136, 1000, 5956, 20011])
def test_pairwise_sum_is_numpys_sum(rng, n):
    a = _wild(rng, n + 5)
    ranges, values = passes.pairwise_stack()
    for lo in (0, 3):
        got = passes.pairwise_sum(a, lo, n, ranges, values)
        assert got.hex() == a[lo:lo + n].sum().hex()
    if n >= 1000:  # a running sum of these values differs from numpy's: the check above can fail
        seq = 0.0
        for v in a[:n]:
            seq += v
        assert seq != a[:n].sum()


def test_outline_is_interpolated_as_numpy_does(rng):
    # one observed site per rod at depth 0 + offset_r: the rod's sums are that site's rho_n exactly
    oz = np.sort(rng.normal(0, 5, 12))
    oz[4] = oz[3]  # a repeated depth
    rad, cen = rng.uniform(5, 15, 12), rng.normal(0, 2, (12, 2))
    depth = np.concatenate([rng.normal(0, 7, 300), oz, [oz[0] - 1, oz[-1] + 1]])  # nodes, both ends, beyond
    xy, tilt = rng.normal(0, 6, (depth.size, 2)), np.array([0.03, -0.02])
    outline = {"z_nm": oz.tolist(), "radius_nm": rad.tolist(), "center_nm": cen.tolist()}
    cols = RodColumns(counts=np.ones((depth.size, 1, 2)), mask=np.ones((depth.size, 1), bool), metals=("Co", "Zn"),
                      rod_xy_nm=xy, tilt=tilt, z_ref_nm=1.5, site_z_nm=np.zeros(1), pitch_nm=0.3,
                      params={"columns": {"outline": outline}}, site_z_offset_nm=depth)
    got = efficiency._rod_sums(cols, efficiency._stored_outline(cols.params))[:, 1]
    ax = xy + tilt * (depth - 1.5)[:, None]
    want = np.hypot(ax[:, 0] - np.interp(depth, oz, cen[:, 0]), ax[:, 1] - np.interp(depth, oz, cen[:, 1]))
    want /= np.interp(depth, oz, rad)
    assert got.tobytes() == want.tobytes()


def _rod_sums_numpy(columns, outline):
    """The per-rod sums of the radial fit with numpy's reductions over every site of the rod."""
    oz, orad, ocen = outline
    z = columns.site_z_nm[None, :] + columns.site_z_offset_nm[:, None]
    dz = z - columns.z_ref_nm
    xy = columns.rod_xy_nm
    if oz.size == 1:
        dx = xy[:, 0, None] - ocen[0, 0] + columns.tilt[0] * dz
        dy = xy[:, 1, None] - ocen[0, 1] + columns.tilt[1] * dz
        rho = np.hypot(dx, dy) / orad[0]
    else:
        dx = xy[:, 0, None] + columns.tilt[0] * dz - np.interp(z, oz, ocen[:, 0])
        dy = xy[:, 1, None] + columns.tilt[1] * dz - np.interp(z, oz, ocen[:, 1])
        rho = np.hypot(dx, dy) / np.interp(z, oz, orad)
    m = columns.mask
    y = np.where(m, columns.counts.sum(axis=2, dtype=np.float64), 0.0)
    rho = np.where(m, rho, 0.0)
    x = rho * rho
    return np.stack([m.sum(1).astype(float), rho.sum(1), x.sum(1), (x * x).sum(1), y.sum(1), (x * y).sum(1)], axis=1)


@pytest.mark.parametrize("k, dtype, n_sites", [(2, np.float32, 300), (3, np.float64, 150), (9, np.float32, 40),
                                               (2, np.float64, 9000)])
def test_radial_sums_are_numpys(rng, k, dtype, n_sites):
    n_rods = 23
    counts = rng.poisson(0.5, (n_rods, n_sites, k)).astype(dtype)
    counts[rng.random(counts.shape) < 0.1] += rng.random() * 10.0 ** -rng.integers(0, 6)  # split ions
    mask = rng.random((n_rods, n_sites)) < 0.7
    mask[3] = False
    counts[~mask & (rng.random(mask.shape) < 0.05)] = np.nan  # never read
    site_z = np.cumsum(rng.random(n_sites)) * 0.3
    zo = rng.uniform(site_z[10], site_z[-10], 9)  # sites beyond both ends too
    zo[5] = zo[4]  # a repeated depth
    zo[2] = site_z[n_sites // 3] + 0.1  # the depth of a site of rod 5 (offset 0.1): exactly at a node
    outlines = {"nodes": {"z_nm": zo.tolist(), "radius_nm": rng.uniform(5, 20, 9).tolist(),
                          "center_nm": rng.normal(0, 2, (9, 2)).tolist()},
                "one": {"z_nm": [3.0], "radius_nm": [11.0], "center_nm": [[0.5, -0.2]]}}
    offset = np.where(np.arange(n_rods) == 5, 0.1, rng.normal(0, 0.05, n_rods))
    for params in ({"columns": {"outline": outlines["nodes"]}}, {"columns": {"outline": outlines["one"]}}, {}):
        cols = RodColumns(counts=counts, mask=mask, metals=tuple("ABCDEFGHI"[:k]),
                          rod_xy_nm=rng.normal(0, 8, (n_rods, 2)), tilt=np.array([0.02, -0.01]), z_ref_nm=4.0,
                          site_z_nm=site_z, pitch_nm=0.3, params=params, site_z_offset_nm=offset)
        outline = efficiency._stored_outline(cols.params) or efficiency._fallback_outline(cols)
        got = efficiency._rod_sums(cols, outline)
        assert got.tobytes() == _rod_sums_numpy(cols, outline).tobytes()
        assert np.isfinite(got).all() and got[3].tolist() == [0.0] * 6  # a rod without observed sites


def test_whole_counts_and_observed_sites_per_rod(rng):
    counts = rng.poisson(0.7, (30, 80, 3)).astype(float)
    counts[rng.random(counts.shape) < 0.2] += 0.25
    counts[0, 0, 0] = 2.0 - 1e-10  # whole up to the tolerance of the split-ion reading
    mask = rng.random((30, 80)) < 0.6
    mask[0, 0] = True
    counts[~mask] = -7.0  # never read
    ref = np.where(mask[:, :, None], np.floor(counts + 1e-9), 0.0).sum(axis=(1, 2))
    np.testing.assert_array_equal(efficiency.whole_counts(counts, mask), ref)
    c32 = counts.astype(np.float32)
    ref32 = np.where(mask[:, :, None], np.floor(c32.astype(np.float64) + 1e-9), 0.0).sum(axis=(1, 2))
    np.testing.assert_array_equal(efficiency.whole_counts(c32, mask), ref32)
    n_obs, whole = passes.rod_whole_counts(counts, mask)
    np.testing.assert_array_equal(n_obs, mask.sum(axis=1))
    np.testing.assert_array_equal(whole, ref)
    data = _rod_data(np.clip(counts, 0, None), mask)
    eff = _with_efficiency(data, np.linspace(0.8, 1.2, 30)).eff
    np.testing.assert_array_equal(eff.n_sites, mask[data.rods].sum(axis=1))


def _distinct_numpy(counts, mask, group):
    """Distinct (count vector, group) rows by sorting every observed site."""
    x = counts[mask].astype(np.float64)
    g = np.repeat(group, mask.sum(axis=1))
    rows, mult = np.unique(np.column_stack([x, g]), axis=0, return_counts=True)
    return rows[:, :-1], rows[:, -1].astype(np.int64), mult.astype(float)


@pytest.mark.parametrize("fractional", [False, True])
def test_distinct_rows_of_rods_are_numpys(rng, fractional):
    counts = rng.poisson(0.8, (40, 120, 3)).astype(np.float32)
    if fractional:
        counts[rng.random(counts.shape) < 0.05] += np.float32(0.5)
    mask = rng.random((40, 120)) < 0.6
    group = rng.integers(0, 7, 40)
    data = _rod_data(counts, mask)
    ref = _distinct_numpy(counts, mask, group)
    for rows in (data.distinct_rows, data.distinct_rows[::-1], data.distinct_rows[1:]):  # the last: one missing
        got = efficiency.distinct_rows_of_rods(counts, mask, group, 7, rows, block=9)
        for a, b in zip(got, ref):
            assert a.dtype == b.dtype
            np.testing.assert_array_equal(a, b)
    table, order = passes.group_row_counts(counts, mask, group, data.distinct_rows, 7)
    assert (table is None) == fractional
    if not fractional:
        assert table.sum() == mask.sum() and table.shape == (len(data.distinct_rows), 7)


def test_independent_step_with_efficiency_is_unchanged_by_the_pass(rng):
    counts, _ = sample_model(P2, 30, 200, random_state=3, rod_efficiency=np.linspace(0.6, 1.2, 30))
    mask = rng.random((30, 200)) < 0.8
    h = np.round(np.linspace(0.6, 1.2, 30), 1)  # rods sharing an efficiency
    state = (np.array([0.4, 0.6]), 0.55, np.array([0.08, 0.05]))
    # the numpy engine's data find the distinct rows by sorting; the compiled engine's by the pass
    ll_np, nxt_np = independent_step(_with_efficiency(_prepare(counts, mask), h))(state)
    ll_c, nxt_c = independent_step(_with_efficiency(_rod_data(counts, mask), h))(state)
    assert ll_c.hex() == ll_np.hex()
    assert float(nxt_c[1]).hex() == float(nxt_np[1]).hex()
    np.testing.assert_array_equal(nxt_c[2], nxt_np[2])


def test_passes_do_not_depend_on_the_thread_count(rng):
    cols, _ = _radial_specimen(rng, n_sites=300)
    counts, mask = cols.counts, cols.mask
    outline = efficiency._stored_outline(cols.params)
    group = np.arange(cols.n_rods) % 5
    rows = _rod_data(counts, mask).distinct_rows
    path = np.where(mask, np.arange(counts.shape[1]) % 2, -1)  # a run per site: many parts of runs
    post = rng.random(counts.shape)
    rod, start = np.nonzero(mask)

    def passes_once():
        return (efficiency._rod_sums(cols, outline), passes.count_totals(counts, mask)[0],
                passes.rod_whole_counts(counts, mask)[1], passes.group_row_counts(counts, mask, group, rows, 5)[0],
                passes.run_posterior_sums(path, post, rod, start))

    n0 = rodchain.set_threads(None)
    try:
        rodchain.set_threads(1)
        one = passes_once()
        rodchain.set_threads(2)
        two = passes_once()
    finally:
        rodchain.set_threads(n0)
    assert cols.n_rods >= 8 * passes._ROD_PART and rod.size >= 2 * passes._RUN_PART
    for a, b in zip(one, two):
        assert a.tobytes() == b.tobytes()
