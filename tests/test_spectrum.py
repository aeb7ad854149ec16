"""Histograms, background model and peak detection on synthetic spectra with known truth."""

import numpy as np
import pytest

from probeseq import InputError
from probeseq.ranging.spectrum import Background, default_bin_width, find_peaks, histogram, log_histogram

FWHM_TO_SIGMA = 1 / 2.3548  # Gaussian FWHM = 2 sqrt(2 ln 2) sigma


def _peaks_on_background(rng, centres, counts, mrp, n_bg, lo=1.0, hi=100.0):
    """Gaussian peaks of FWHM m/mrp and a background uniform in sqrt(m) (flat in flight time)."""
    m = [rng.normal(c, c / mrp * FWHM_TO_SIGMA, n) for c, n in zip(centres, counts)]
    u = rng.uniform(np.sqrt(lo), np.sqrt(hi), n_bg)
    return np.concatenate(m + [u ** 2])


def test_histogram_matches_numpy(rng):
    m = rng.uniform(0.6, 80, 20000)
    s = histogram(m, bin_width_da=0.05, range_da=(1.0, 50.0))
    ref, _ = np.histogram(m, bins=s.edges_da)
    np.testing.assert_array_equal(s.counts, ref)
    assert np.allclose(np.diff(s.edges_da), 0.05)
    assert s.n_ions == int(((m >= 1.0) & (m < s.edges_da[-1])).sum())


def test_default_bin_width():
    assert default_bin_width(500) == 0.01
    assert default_bin_width(1000) == 0.005
    assert 0.01 <= default_bin_width(300) <= 0.02


def test_log_histogram_has_constant_relative_width(rng):
    m = rng.uniform(0.6, 120, 20000)
    s = log_histogram(m, range_da=(1.0, 100.0), relative_width=1e-3)
    rel = np.diff(np.log(s.edges_da))
    np.testing.assert_allclose(rel, 1e-3, rtol=1e-9)
    ref, _ = np.histogram(m, bins=s.edges_da)
    np.testing.assert_array_equal(s.counts, ref)


def test_empty_or_windowless_spectra_raise(rng):
    with pytest.raises(InputError, match="empty"):
        histogram(np.zeros(0))
    m = rng.uniform(10, 20, 100)
    with pytest.raises(InputError, match="no counts in the requested window 50-60 Da") as e:
        find_peaks(m, range_da=(50, 60))
    assert "\n" not in str(e.value)
    with pytest.raises(InputError, match="range_da"):
        histogram(m, range_da=(5, 2))
    with pytest.raises(InputError, match="bin_width_da"):
        histogram(m, bin_width_da=0)


def test_peak_positions_widths_and_counts(rng):
    centres = [12.0, 27.995, 31.972, 58.933, 63.929]
    counts = [4000, 3000, 800, 2000, 1200]
    mrp = 500.0
    m = _peaks_on_background(rng, centres, counts, mrp, n_bg=3000)
    ps = find_peaks(m, resolving_power=mrp)
    pk = ps.peaks
    assert len(pk) == len(centres)  # no spurious peaks on a flat background
    for c, n in zip(centres, counts):
        i = int(np.argmin(np.abs(pk.position_da - c)))
        fwhm = c / mrp
        assert abs(pk.position_da[i] - c) < 0.05 * fwhm
        assert abs(pk.fwhm_da[i] / fwhm - 1) < 0.15
        # the 10 % window holds 98.4 % of a Gaussian (+-2.146 sigma)
        assert abs(pk.net_counts[i] - 0.984 * n) < 4 * np.sqrt(n) + 0.02 * n
        assert pk.low_da[i] < c < pk.high_da[i]
        assert pk.signal_to_background[i] > 10
    assert abs(ps.resolving_power / mrp - 1) < 0.15


def test_background_model_recovers_flat_time_of_flight_background(rng):
    # 20000 background ions uniform in sqrt(m) over 1-100 Da: expected counts in [a, b) are
    # N (sqrt(b) - sqrt(a)) / (10 - 1)
    n_bg = 20000
    m = _peaks_on_background(rng, [16.0, 44.0, 64.0], [5000, 5000, 5000], 500.0, n_bg=n_bg)
    ps = find_peaks(m)
    lo = np.array([15.9, 20.0, 43.8, 63.7, 80.0])
    hi = np.array([16.2, 21.0, 44.3, 64.4, 82.0])
    expected = n_bg * (np.sqrt(hi) - np.sqrt(lo)) / 9.0
    got, sigma = ps.background.counts(lo, hi)
    z = (got - expected) / np.sqrt(sigma ** 2 + expected)
    assert np.all(np.abs(z) < 4), (got, expected, sigma)
    assert np.all(sigma > 0)
    # density falls as m^-1/2
    d = ps.background.density_per_da(np.array([20.0, 80.0]))
    assert abs(d[0] / d[1] - 2.0) < 0.3


def test_background_rate_is_poisson_mle_of_peak_free_counts():
    from probeseq.ranging.spectrum import Spectrum

    edges = np.linspace(1, 100, 991)
    counts = np.full(990, 3)
    counts[500:510] = 1000  # a "peak"
    free = np.ones(990, dtype=bool)
    free[495:515] = False
    spec = Spectrum(edges, counts)
    bg = Background.from_spectrum(spec, free, half_width_u=0.3)
    u = np.sqrt(edges)
    i = 505
    rate, n, L = bg.rate(np.array([u[i]]))
    lo, hi = u[i] - 0.3, u[i] + 0.3
    sel = free & (u[:-1] >= lo) & (u[1:] <= hi)
    # interior bins only: the interpolated ends add at most one bin on each side
    assert abs(n[0] - counts[sel].sum()) <= 2 * 3 + 1e-9
    assert abs(rate[0] - counts[sel].sum() / np.diff(u)[sel].sum()) / rate[0] < 0.05


def test_weak_peak_thresholds(rng):
    # a 60-count peak on a moderate background is found; a 4-count one is not
    base = _peaks_on_background(rng, [30.0], [60], 500.0, n_bg=5000)
    ps = find_peaks(base)
    assert np.any(np.abs(ps.peaks.position_da - 30.0) < 0.03)
    tiny = np.concatenate([rng.uniform(1, 100, 3000), rng.normal(45.0, 0.01, 4)])
    ps = find_peaks(tiny)
    assert not np.any(np.abs(ps.peaks.position_da - 45.0) < 0.1)


def test_pure_background_has_no_peaks(rng):
    m = rng.uniform(1.0, 100.0, 30000)
    assert len(find_peaks(m).peaks) == 0


def test_peak_table_columns_are_json_ready(rng):
    m = _peaks_on_background(rng, [20.0], [500], 500.0, n_bg=500)
    cols = find_peaks(m).peaks.columns()
    assert set(cols) >= {"position_da", "height_per_da", "fwhm_da", "counts", "signal_to_background"}
    assert all(isinstance(v, float) for vals in cols.values() for v in vals)


def test_peak_shape_cdf_matches_monte_carlo(rng):
    from probeseq.ranging.spectrum import PeakShape

    # an exponentially modified Gaussian mixture, sampled directly
    sh = PeakShape(r0=600.0, mu=0.1, sigma=0.4, tail_fraction=0.5, tail_scale=1.5)
    n = 400_000
    v = rng.normal(0.1, 0.4, n)
    t = rng.random(n) < 0.5
    v[t] += rng.exponential(1.5, t.sum())
    for q in (-1.0, 0.0, 0.5, 1.0, 3.0, 8.0):
        assert abs(sh.cdf(q) - (v < q).mean()) < 4 * np.sqrt(0.25 / n) + 1e-4
    assert abs(sh.fraction(60.0, 50.0, 70.0) - 1.0) < 1e-9


def test_fit_peak_shape_recovers_simulated_shape(rng):
    from probeseq.ranging.spectrum import fit_peak_shape, resolving_power_law

    mrp, f_tail, tail = 600.0, 0.5, 1.5  # FWHM m/mrp; tail mean 1.5 m/mrp on half the ions
    centres = np.array([12.0, 16.0, 44.0, 58.933])
    parts = []
    for c in centres:
        x = rng.normal(c, c / mrp / 2.3548, 20000)
        t = rng.random(x.size) < f_tail
        x[t] += rng.exponential(tail * c / mrp, t.sum())
        parts.append(x)
    m = np.concatenate(parts + [rng.uniform(1, 100, 3000)])
    ps = find_peaks(m, resolving_power=mrp)
    r0, beta = resolving_power_law(ps.peaks)
    assert abs(beta) < 0.1
    sh = fit_peak_shape(ps.spectrum, ps.background_per_bin, centres, mrp, 0.0)
    assert sh is not None
    assert abs(sh.sigma / (1 / 2.3548) - 1) < 0.05
    assert abs(sh.tail_fraction - f_tail) < 0.05
    assert abs(sh.tail_scale / tail - 1) < 0.1
    assert abs(sh.mu) < 0.05
