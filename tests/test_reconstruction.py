"""The reconstruction calibrated on the lattice: depth scale, plane curvature, lateral magnification.

The method is the lattice calibration of a reconstruction by Fourier (spatial-distribution)
analysis along a known crystal direction (docs/REFERENCES.md §7): the site planes are one site
pitch apart, a length the crystal fixes, so their periodicity in the file's depth gives the depth
scale. The checks use simulated runs whose artefacts are known exactly.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from probeseq.exceptions import DataQualityWarning, InputError
from probeseq.lattice.calibrate import calibrate_reconstruction
from probeseq.lattice.correction import ReconstructionCorrection
from probeseq.lattice.depthscale import calibrate_depth
from probeseq.lattice.registration import register_lattice
from probeseq.simulation.simulate import simulate_run, true_depth_scale


def _metal(run):
    sel = run.ion_metal >= 0
    return run.ions.x[sel], run.ions.y[sel], run.ions.z[sel]


@pytest.fixture(scope="module")
def ideal():
    return simulate_run(pattern="random", depth_nm=30, top_radius_nm=7, seed=41, tilt_deg=0.0)


def test_depth_scale_and_its_change_recovered():
    # a depth scale 6 % long that grows by 4 % over the depth: Fourier analysis of the metal ions
    # along the known rod direction (REFERENCES §7) gives the local scale everywhere
    run = simulate_run(pattern="random", depth_nm=30, top_radius_nm=7, seed=42, tilt_deg=0.0,
                       depth_scale=1.06, depth_scale_change=0.04)
    x, y, z = _metal(run)
    cal = calibrate_depth(x, y, z, pitch_nm=run.lattice.pitch_nm, random_state=0)
    assert cal.calibrated, cal.reason
    assert cal.mean_scale == pytest.approx(1.06 * 1.02, rel=0.003)
    inner = (cal.scale_z_nm > 2) & (cal.scale_z_nm < 29)
    truth = true_depth_scale(run.truth, cal.scale_z_nm[inner])
    assert np.max(np.abs(cal.scale[inner] / truth - 1)) < 0.01
    # the local scale rises with depth as simulated, not a constant
    assert cal.scale[inner][-1] - cal.scale[inner][0] > 0.03
    assert cal.contrast_after > 5 * cal.contrast_before
    # the windows are scanned on the kernels' threads: the same calibration on one thread
    from probeseq import runtime

    before = runtime.kernel_threads()
    try:
        runtime.configure(1)
        one = calibrate_depth(x, y, z, pitch_nm=run.lattice.pitch_nm, random_state=0)
    finally:
        runtime.configure(before)
    np.testing.assert_array_equal(one.window_scale, cal.window_scale)
    np.testing.assert_array_equal(one.depth_nm, cal.depth_nm)


def test_plane_curvature_recovered():
    kappa = -0.004  # 1/nm: the planes bend up by 0.2 nm at 7 nm from the axis
    run = simulate_run(pattern="random", depth_nm=30, top_radius_nm=7, seed=43, tilt_deg=0.0,
                       plane_curvature_per_nm=kappa)
    x, y, z = _metal(run)
    cal = calibrate_depth(x, y, z, pitch_nm=run.lattice.pitch_nm, random_state=0)
    assert cal.calibrated
    assert cal.curvature_per_nm == pytest.approx(kappa, abs=5 * cal.curvature_err + 2e-4)
    assert cal.mean_scale == pytest.approx(1.0, abs=0.005)
    assert abs(cal.residual["rms_pitches"]) < 0.05


def test_ideal_run_is_left_as_it_is(ideal):
    x, y, z = _metal(ideal)
    cal = calibrate_depth(x, y, z, pitch_nm=ideal.lattice.pitch_nm, random_state=0)
    assert cal.calibrated
    assert cal.mean_scale == pytest.approx(1.0, abs=0.002)
    assert abs(cal.curvature_per_nm) < 5e-4
    assert cal.contrast_after == pytest.approx(cal.contrast_before, abs=0.02)


def test_short_depth_range_is_said_and_not_calibrated(ideal):
    x, y, z = _metal(ideal)
    keep = z < 6.0  # 26 site planes
    reg = register_lattice(x, y, z, ideal.lattice, random_state=0)
    with pytest.warns(DataQualityWarning, match="too short to calibrate the depth scale"):
        corr = calibrate_reconstruction(x[keep], y[keep], z[keep], reg, lateral=False, random_state=0)
    assert corr.is_identity
    assert corr.report["depth"]["calibrated"] is False


def test_wrong_pitch_names_found_and_expected(ideal):
    # a repeat given 20 % too short: the ions repeat at 1.25 x the lattice's pitch
    x, y, z = _metal(ideal)
    p = ideal.lattice.pitch_nm
    cal = calibrate_depth(x, y, z * 1.3, pitch_nm=p, random_state=0)
    assert not cal.calibrated
    assert "repeat every" in cal.reason and f"{p:.4g} nm" in cal.reason
    assert cal.found_pitch_nm == pytest.approx(1.3 * p, rel=0.03)


def test_no_periodic_signal_is_said(ideal):
    x, y, z = _metal(ideal)
    rng = np.random.default_rng(0)
    cal = calibrate_depth(x, y, rng.uniform(z.min(), z.max(), z.size), pitch_nm=ideal.lattice.pitch_nm,
                          random_state=0)
    assert not cal.calibrated and "too weak" in cal.reason


def test_lateral_magnification_change_found_and_corrected():
    run = simulate_run(pattern="random", depth_nm=40, top_radius_nm=9, seed=44, magnification_change=0.06)
    x, y, z = _metal(run)
    reg = register_lattice(x, y, z, run.lattice, random_state=0)
    corr = calibrate_reconstruction(x, y, z, reg, depth=False, random_state=0)
    lat = corr.report["lateral"]
    assert lat["applied"]
    # m = 1 + 0.06 zeta / D over the file's depth range: a change of about 0.06
    assert lat["magnification_change"] == pytest.approx(0.06, abs=0.01)
    # after correction the lattice fits every slab at one scale
    xc, yc, zc = corr.apply(x, y, z)
    top, bottom = zc < np.quantile(zc, 0.2), zc > np.quantile(zc, 0.8)
    s_top = register_lattice(xc[top], yc[top], zc[top], run.lattice, random_state=0).scale
    s_bot = register_lattice(xc[bottom], yc[bottom], zc[bottom], run.lattice, random_state=0).scale
    assert abs(s_bot / s_top - 1) < 0.01


def test_correction_round_trip_and_record():
    g = np.linspace(0, 20, 41)
    corr = ReconstructionCorrection(grid_z_nm=g, depth_nm=g / 1.05 + 0.001 * g ** 2, magnification=1 + 0.002 * g,
                                    shift_nm=np.column_stack([0.01 * g, -0.02 * g]),
                                    axis_nm=np.column_stack([0.1 + 0 * g, -0.2 + 0 * g]), curvature_per_nm=0.003)
    rng = np.random.default_rng(1)
    x, y, z = rng.uniform(-8, 8, 500), rng.uniform(-8, 8, 500), rng.uniform(-2, 22, 500)
    xc, yc, zc = corr.apply(x, y, z)
    assert not np.allclose(zc, z)
    xf, yf, zf = corr.to_file(xc, yc, zc, n_iter=8)
    np.testing.assert_allclose(np.c_[xf, yf, zf], np.c_[x, y, z], atol=1e-6)
    again = ReconstructionCorrection.from_dict(corr.to_dict())
    np.testing.assert_allclose(np.column_stack(again.apply(x, y, z)), np.c_[xc, yc, zc], atol=1e-4)
    # float32 stays float32
    assert corr.apply(x.astype(np.float32), y.astype(np.float32), z.astype(np.float32))[2].dtype == np.float32
    ident = ReconstructionCorrection.identity(0, 10)
    assert ident.is_identity and ident.apply(x, y, z)[2] is not None
    np.testing.assert_array_equal(ident.apply(x, y, z)[2], z)


def _to_file_reference(corr, xc, yc, zc, n_iter):
    """The inverse map written with np.interp (linear extrapolation at both ends), numpy only."""
    def lerp(v, xp, fp):
        out = np.interp(v, xp, fp)
        lo, hi = v < xp[0], v > xp[-1]
        out[lo] = fp[0] + (v[lo] - xp[0]) * (fp[1] - fp[0]) / (xp[1] - xp[0])
        out[hi] = fp[-1] + (v[hi] - xp[-1]) * (fp[-1] - fp[-2]) / (xp[-1] - xp[-2])
        return out

    g = corr.grid_z_nm
    w = lerp(zc, corr.depth_nm, g)
    zf = w.copy()
    for _ in range(n_iter):
        zf = w + corr.curvature_per_nm * ((xc - lerp(zf, g, corr.axis_nm[:, 0])) ** 2
                                          + (yc - lerp(zf, g, corr.axis_nm[:, 1])) ** 2)
    m = lerp(zf, g, corr.magnification)
    return (xc - lerp(zf, g, corr.shift_nm[:, 0])) * m, (yc - lerp(zf, g, corr.shift_nm[:, 1])) * m, zf


def test_inverse_map_matches_a_numpy_reference_inside_and_beyond_the_tables():
    g = np.linspace(-3, 25, 57)
    corr = ReconstructionCorrection(grid_z_nm=g, depth_nm=g / 0.97 + 0.002 * (g + 3) ** 2,
                                    magnification=1 + 0.004 * np.sin(g / 4),
                                    shift_nm=np.column_stack([0.02 * g, -0.01 * g + 0.003 * g ** 1.0]),
                                    axis_nm=np.column_stack([0.3 + 0.01 * g, -0.2 + 0 * g]), curvature_per_nm=-0.004)
    rng = np.random.default_rng(7)
    # calibrated depths below, inside and above the table (both extrapolations), and table nodes
    zc = np.concatenate([rng.uniform(-12, 45, 3000), corr.depth_nm])
    xc, yc = rng.uniform(-9, 9, zc.size), rng.uniform(-9, 9, zc.size)
    for n_iter in (0, 1, 4):
        got = corr.to_file(xc, yc, zc, n_iter=n_iter)
        want = _to_file_reference(corr, xc, yc, zc, n_iter)
        np.testing.assert_allclose(np.column_stack(got), np.column_stack(want), rtol=1e-12, atol=1e-12)
    # NaN stays NaN
    assert np.isnan(corr.to_file(np.array([0.0]), np.array([0.0]), np.array([np.nan]))[2][0])


def test_site_positions_in_the_file_frame_follow_the_rod_axes_through_the_inverse_map():
    """file_site_positions (one compiled pass over the sites, on the kernels' threads): the site's
    point on its tilted rod axis, then the inverse map, against numpy and the np.interp reference."""
    from types import SimpleNamespace

    from probeseq import runtime
    from probeseq.lattice.correction import file_site_positions

    g = np.linspace(-3, 25, 57)
    corr = ReconstructionCorrection(grid_z_nm=g, depth_nm=g / 0.97 + 0.002 * (g + 3) ** 2,
                                    magnification=1 + 0.004 * np.sin(g / 4),
                                    shift_nm=np.column_stack([0.02 * g, -0.01 * g]),
                                    axis_nm=np.column_stack([0.3 + 0.01 * g, -0.2 + 0 * g]), curvature_per_nm=-0.004)
    rng = np.random.default_rng(8)
    n_rods, n_sites = 40, 120
    cols = SimpleNamespace(site_z_nm=np.linspace(0.1, 24.0, n_sites), site_z_offset_nm=rng.uniform(-0.1, 0.1, n_rods),
                           rod_xy_nm=rng.uniform(-8, 8, (n_rods, 2)), tilt=np.array([0.02, -0.03]), z_ref_nm=11.0,
                           params={"reconstruction": corr.to_dict()})
    r = rng.integers(0, n_rods, 150_000)
    s = rng.integers(0, n_sites, r.size)
    z = cols.site_z_nm[s] + cols.site_z_offset_nm[r]
    xy = cols.rod_xy_nm[r] + cols.tilt[None, :] * (z - cols.z_ref_nm)[:, None]
    table_corr = ReconstructionCorrection.from_dict(cols.params["reconstruction"])
    want = _to_file_reference(table_corr, xy[:, 0], xy[:, 1], z, 4)
    got_xy, got_z = file_site_positions(cols, r, s)
    np.testing.assert_allclose(np.column_stack([got_xy, got_z]), np.column_stack(want), rtol=1e-12, atol=1e-12)
    np.testing.assert_array_equal(np.column_stack([got_xy, got_z]),
                                  np.column_stack(table_corr.to_file(xy[:, 0], xy[:, 1], z)))
    before = runtime.kernel_threads()
    try:
        runtime.configure(1)
        one_xy, one_z = file_site_positions(cols, r, s)
    finally:
        runtime.configure(before)
    np.testing.assert_array_equal(one_xy, got_xy)
    np.testing.assert_array_equal(one_z, got_z)
    # without a correction: the axis points themselves
    cols.params = {}
    plain_xy, plain_z = file_site_positions(cols, r, s)
    np.testing.assert_array_equal(plain_z, z)
    np.testing.assert_array_equal(plain_xy, xy)


def test_bad_tables_are_refused():
    g = np.linspace(0, 10, 11)
    with pytest.raises(InputError, match="increase"):
        ReconstructionCorrection(grid_z_nm=g, depth_nm=-g, magnification=np.ones(11), shift_nm=np.zeros((11, 2)),
                                 axis_nm=np.zeros((11, 2)))
    with pytest.raises(InputError, match="rows"):
        ReconstructionCorrection(grid_z_nm=g, depth_nm=g, magnification=np.ones(5), shift_nm=np.zeros((11, 2)),
                                 axis_nm=np.zeros((11, 2)))


def test_analysis_corrects_run_lengths_and_keeps_file_positions():
    from probeseq.outputs.results import tracks_table
    from probeseq.pipeline import AnalysisOptions, analyze

    run = simulate_run(pattern="long-block", depth_nm=36, top_radius_nm=8, seed=45, depth_scale=1.08)
    truth = run.truth["mean_run_length_realised"]
    out = {}
    for corr in (True, False):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", DataQualityWarning)
            res = analyze(run.ions, run.config.metals, run.lattice,
                          options=AnalysisOptions(seed=1, n_boot=20, correct_reconstruction=corr))
        mrl = res.statistics.to_dict()["mean_run_length_sites"]
        out[corr] = max(abs(mrl[m] / truth[m] - 1) for m in run.config.metals)
        if corr:
            rec = res.columns.params["reconstruction"]
            assert rec["depth"]["mean_depth_scale"] == pytest.approx(1.08, rel=0.005)
            # sites are reported where they are in the file: their depths span the file's range
            t = tracks_table(res.columns, res.decoded)
            assert t["z_nm"].max() > 0.9 * run.ions.z.max()
            assert res.columns.pitch_nm == pytest.approx(run.lattice.pitch_nm)
    # the file's depth scale lengthens every run by 8 %; the calibration removes it
    assert out[True] < 0.05
    assert out[False] > out[True] + 0.03


def test_depth_scale_far_off_is_corrected_with_a_warning(ideal):
    # a repeat given 15 % too large reads as depths 15 % too short: corrected, and said, with the
    # pitch found against the lattice's
    x, y, z = _metal(ideal)
    reg = register_lattice(x, y, z, ideal.lattice, random_state=0)
    with pytest.warns(DataQualityWarning, match="repeat every .* nm in depth where the lattice's site pitch gives"):
        corr = calibrate_reconstruction(x, y, z * 0.85, reg, lateral=False, random_state=0)
    assert corr.report["depth"]["mean_depth_scale"] == pytest.approx(0.85, rel=0.005)
