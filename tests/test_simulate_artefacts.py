"""Reconstruction artefacts of the simulator: each against its formula, and off by default.

Runs with and without an artefact share the seed; an artefact that only moves positions draws no
random number, so the two runs hold the same ions in the same order and the maps can be checked
ion by ion.
"""

import hashlib
import json
import math

import numpy as np
import pytest

from probeseq import InputError
from probeseq.cli.main import main
from probeseq.simulation.simulate import SimConfig, simulate_run, true_depth_scale

SMALL = dict(seed=3, depth_nm=10, top_radius_nm=4)
# tilt 0 keeps every rod axis at one (x, y), so the site spacing along a rod is the pitch
FLAT = dict(seed=5, depth_nm=12, top_radius_nm=5, tilt_deg=0.0)
ARTEFACTS_OFF = dict(depth_scale=1.0, depth_scale_change=0.0, plane_curvature_per_nm=0.0,
                     magnification_change=0.0, edge_efficiency=1.0)

#: run(seed=3, depth_nm=10, top_radius_nm=4) made before the artefacts existed: its number of
#: ions and the sha256 of its x and z (concatenated, rounded to 1e-6 nm)
BEFORE_N_IONS = 8637
BEFORE_XZ_SHA256 = "cffbc59abbca707ab9c52a67695525f800747ded3436340938735bdd0bda5c4f"


def _arrays(run):
    return (run.ions.x, run.ions.y, run.ions.z, run.ions.mass_to_charge, run.ions.pulse_number,
            run.ions.dc_voltage_v, run.rod_xy_nm, run.rod_tilt, run.seq, run.site_z_nm, run.ion_rod,
            run.ion_site, run.ion_metal, run.ion_species)


@pytest.fixture(scope="module")
def flat_ideal():
    return simulate_run(**FLAT)


def _longest_rod(truth):
    return max(truth["rods"], key=lambda r: len(r["z_nm"]))


# ---------------------------------------------------------------------- off by default
def test_defaults_leave_the_run_as_before():
    plain = simulate_run(**SMALL)
    explicit = simulate_run(**SMALL, **ARTEFACTS_OFF)
    for a, b in zip(_arrays(plain), _arrays(explicit)):
        np.testing.assert_array_equal(a, b)
    assert json.dumps(plain.truth, sort_keys=True) == json.dumps(explicit.truth, sort_keys=True)
    assert plain.ions.n_ions == BEFORE_N_IONS
    xz = np.round(np.concatenate([plain.ions.x, plain.ions.z]), 6)
    assert hashlib.sha256(xz.tobytes()).hexdigest() == BEFORE_XZ_SHA256
    # without artefacts the mapped depths are the ideal ones and no axis points are listed
    for rod in plain.truth["rods"]:
        assert rod["z_nm"] == rod["z_ideal_nm"] and "axis_xy_nm" not in rod
    rec = plain.truth["reconstruction"]
    assert {k: rec[k] for k in ARTEFACTS_OFF} == ARTEFACTS_OFF
    assert rec["plane_sag_at_top_radius_nm"] == 0.0 and rec["sigma_z_nm"] == plain.config.sigma_z_nm
    np.testing.assert_array_equal(plain.rod_tilt_per_rod, np.tile(plain.rod_tilt, (plain.rod_xy_nm.shape[0], 1)))


# ---------------------------------------------------------------------- depth scale
def test_depth_scale_stretches_depth_only(flat_ideal):
    run = simulate_run(**FLAT, depth_scale=1.05)
    np.testing.assert_array_equal(run.ions.x, flat_ideal.ions.x)
    np.testing.assert_array_equal(run.ions.mass_to_charge, flat_ideal.ions.mass_to_charge)
    np.testing.assert_allclose(run.ions.z, 1.05 * flat_ideal.ions.z, rtol=1e-12, atol=1e-12)
    metal, metal0 = run.ions.z[run.ion_metal >= 0], flat_ideal.ions.z[flat_ideal.ion_metal >= 0]
    assert np.ptp(metal) / np.ptp(metal0) == pytest.approx(1.05, rel=1e-9)
    pitch = run.truth["pitch_nm"]
    rod = _longest_rod(run.truth)
    assert len(rod["z_nm"]) > 20
    np.testing.assert_allclose(np.diff(rod["z_nm"]), 1.05 * pitch, atol=2e-4)
    np.testing.assert_allclose(np.diff(rod["z_ideal_nm"]), pitch, atol=2e-4)
    np.testing.assert_allclose(run.site_z_nm, 1.05 * flat_ideal.site_z_nm, rtol=1e-12)
    np.testing.assert_allclose(true_depth_scale(run.truth, [0.0, 6.0, 12.0]), 1.05)


def test_depth_scale_divides_the_reconstructed_tilt():
    kw = dict(seed=2, depth_nm=8, top_radius_nm=4, tilt_deg=1.2, tilt_azimuth_deg=40.0)
    ideal, run = simulate_run(**kw), simulate_run(**kw, depth_scale=1.25)
    # a rod axis x = x0 + t zeta is x0 + (t / 1.25) z_rec in the file's frame
    np.testing.assert_allclose(run.rod_tilt, ideal.rod_tilt / 1.25, rtol=1e-9)
    np.testing.assert_allclose(run.rod_xy_nm, ideal.rod_xy_nm, atol=1e-9)
    assert run.truth["rods"][0]["dxdz"] == pytest.approx(ideal.rod_tilt[0] / 1.25, abs=1e-7)


def test_depth_scale_change_makes_the_site_spacing_grow_linearly():
    s0, c, depth = 1.1, 0.4, 20.0
    run = simulate_run(seed=4, depth_nm=depth, top_radius_nm=3, tilt_deg=0.0, sigma_z_nm=0.0, depth_scale=s0,
                       depth_scale_change=c)
    pitch = run.truth["pitch_nm"]
    rod = _longest_rod(run.truth)
    z, zeta = np.array(rod["z_nm"]), np.array(rod["z_ideal_nm"])
    assert zeta.size > 60
    # Z(zeta + p) - Z(zeta) = s0 p (1 + c (zeta + p / 2) / D): linear in the midpoint, at rate s0 p c / D
    spacing, mid = np.diff(z), zeta[:-1] + pitch / 2
    rate, at0 = np.polyfit(mid, spacing, 1)
    assert rate == pytest.approx(s0 * pitch * c / depth, rel=0.02)
    assert at0 == pytest.approx(s0 * pitch, rel=2e-3)
    np.testing.assert_allclose(z, s0 * (zeta + c * zeta ** 2 / (2 * depth)), atol=3e-4)
    # the local scale at the reconstructed depth of each site is s0 (1 + c zeta / D)
    np.testing.assert_allclose(true_depth_scale(run.truth, z), s0 * (1 + c * zeta / depth), rtol=1e-4)
    np.testing.assert_allclose(true_depth_scale(run.config, z), true_depth_scale(run, z))
    # the metal ions follow the same map (same seed: the same ions, moved)
    ideal = simulate_run(**{**run.config.__dict__, "depth_scale": 1.0, "depth_scale_change": 0.0})
    z0 = ideal.ions.z
    np.testing.assert_allclose(run.ions.z, s0 * (z0 + c * z0 ** 2 / (2 * depth)), rtol=1e-12)


def test_truth_of_an_old_run_is_an_ideal_depth_scale():
    assert np.all(true_depth_scale({"config": {"depth_nm": 10.0}}, [1.0, 9.0]) == 1.0)
    with pytest.raises(InputError, match="true_depth_scale"):
        true_depth_scale(3.0, [1.0])


# ---------------------------------------------------------------------- plane curvature
def test_plane_curvature_adds_kappa_rho_squared(flat_ideal):
    kappa = 0.03
    run = simulate_run(**FLAT, plane_curvature_per_nm=kappa)
    rho2 = (run.rod_xy_nm ** 2).sum(1)
    assert np.sqrt(rho2).min() < 1.5 and np.sqrt(rho2).max() > 5.0  # rods near the axis and at the edge
    shift = run.site_z_nm - flat_ideal.site_z_nm
    np.testing.assert_allclose(shift, kappa * rho2[:, None] * np.ones_like(shift), atol=1e-9)
    for rod, r2 in zip(run.truth["rods"], rho2):
        np.testing.assert_allclose(np.subtract(rod["z_nm"], rod["z_ideal_nm"]), kappa * r2, atol=2e-4)
    # every ion is moved by kappa times its own squared distance from the axis
    r2_ion = flat_ideal.ions.x ** 2 + flat_ideal.ions.y ** 2
    np.testing.assert_allclose(run.ions.z - flat_ideal.ions.z, kappa * r2_ion, atol=1e-9)
    assert run.truth["reconstruction"]["plane_sag_at_top_radius_nm"] == pytest.approx(kappa * 5.0 ** 2)
    np.testing.assert_allclose(true_depth_scale(run.truth, [1.0, 10.0]), 1.0)  # curvature left out


# ---------------------------------------------------------------------- magnification
def test_magnification_change_scales_the_lateral_spread(flat_ideal):
    mc, depth = 0.25, FLAT["depth_nm"]
    run = simulate_run(**FLAT, magnification_change=mc)
    z0 = flat_ideal.ions.z
    np.testing.assert_array_equal(run.ions.z, z0)
    np.testing.assert_allclose(run.ions.x, (1 + mc * z0 / depth) * flat_ideal.ions.x, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(run.ions.y, (1 + mc * z0 / depth) * flat_ideal.ions.y, rtol=1e-12, atol=1e-12)

    def spread(r, lo, hi):
        sel = (z0 >= lo) & (z0 < hi)
        return np.sqrt(np.mean(r.ions.x[sel] ** 2 + r.ions.y[sel] ** 2))

    # bottom over top, relative to the ideal run: m(bottom) / m(top), between the slabs' end values
    gain = (spread(run, 0.9 * depth, depth) / spread(flat_ideal, 0.9 * depth, depth)) / \
           (spread(run, 0, 0.1 * depth) / spread(flat_ideal, 0, 0.1 * depth))
    assert (1 + 0.9 * mc) / (1 + 0.1 * mc) <= gain <= 1 + mc
    # the rods fan out: with no tilt, axis x0 (1 + mc z / D), a line of slope x0 mc / D per rod
    for rod, xy in zip(run.truth["rods"], flat_ideal.rod_xy_nm):
        assert rod["dxdz"] == pytest.approx(xy[0] * mc / depth, abs=2e-7)
        assert rod["dydz"] == pytest.approx(xy[1] * mc / depth, abs=2e-7)
        axis = np.array(rod["axis_xy_nm"])
        assert axis.shape == (len(rod["z_nm"]), 2)
        np.testing.assert_allclose(axis, xy[None, :] * (1 + mc * np.array(rod["z_ideal_nm"])[:, None] / depth),
                                   atol=2e-4)
    np.testing.assert_allclose(run.rod_xy_nm, flat_ideal.rod_xy_nm, atol=1e-9)
    np.testing.assert_allclose(run.rod_tilt_per_rod, flat_ideal.rod_xy_nm * mc / depth, atol=1e-9)


def test_magnification_change_with_a_tilt_fits_straight_axes():
    mc, depth = -0.2, 10.0
    run = simulate_run(seed=6, depth_nm=depth, top_radius_nm=4, tilt_deg=1.5, magnification_change=mc)
    t = np.hypot(run.truth["distortion"]["tilt_x"], run.truth["distortion"]["tilt_y"])
    assert 0.02 < t < 0.03
    for r, rod in enumerate(run.truth["rods"]):
        axis, z = np.array(rod["axis_xy_nm"]), np.array(rod["z_nm"])
        if z.size < 3:
            continue
        res = axis - (np.array([rod["x0"], rod["y0"]]) + np.outer(z, [rod["dxdz"], rod["dydz"]]))
        # least squares: the residuals are orthogonal to 1 and z (up to the truth's rounding) ...
        assert np.abs(res.sum(0)).max() < 1e-4 * z.size
        assert np.abs((res * (z - z.mean())[:, None]).sum(0)).max() < 1e-4 * np.abs(z - z.mean()).sum()
        # ... and what is left is the bend (1 + mc zeta / D)(x0 + t zeta) - line, below mc t L^2 / (4 D)
        assert np.abs(res).max() < abs(mc) * t * np.ptp(z) ** 2 / (4 * depth) + 2e-4
        np.testing.assert_allclose(run.rod_tilt_per_rod[r], [rod["dxdz"], rod["dydz"]], atol=1e-7)
    # rod_tilt: the joint fit of lines with one slope and an offset each, through the inside sites
    rods = [r for r in run.truth["rods"] if len(r["z_nm"]) >= 2]
    dz = [np.array(r["z_nm"]) - np.mean(r["z_nm"]) for r in rods]
    dxy = [np.array(r["axis_xy_nm"]) - np.mean(r["axis_xy_nm"], axis=0) for r in rods]
    common = sum((d[:, None] * a).sum(0) for d, a in zip(dz, dxy)) / sum((d * d).sum() for d in dz)
    np.testing.assert_allclose(run.rod_tilt, common, atol=2e-5)
    # the rods fan out about the axis: their slopes spread by mc R / D around the common one
    assert np.ptp(run.rod_tilt_per_rod[:, 0]) > abs(mc) * 4 / depth


# ---------------------------------------------------------------------- edge efficiency
def test_edge_efficiency_halves_the_ions_at_the_outline():
    cfg = dict(seed=8, depth_nm=10, top_radius_nm=7, half_angle_deg=0.0, tilt_deg=0.0, eta=1.0, sigma_xy_nm=0.05,
               helix_radius_nm=0.0)
    ideal = simulate_run(**cfg)
    run = simulate_run(**cfg, edge_efficiency=0.5)
    inside = run.seq >= 0
    n_sites = run.seq.shape[1]
    per_site = np.bincount(run.ion_rod[run.ion_rod >= 0] * n_sites + run.ion_site[run.ion_rod >= 0],
                           minlength=run.seq.size).reshape(run.seq.shape)
    q = np.broadcast_to((np.sqrt((run.rod_xy_nm ** 2).sum(1)) / 7.0)[:, None], run.seq.shape)
    rates = {}
    for name, sel in (("axis", inside & (q < 0.4)), ("edge", inside & (q > 0.85))):
        n = int(sel.sum())
        assert n > 150, name
        kept = per_site[sel].sum() / n
        want = float(np.mean(1 - 0.5 * q[sel] ** 2))  # eta = 1: one ion per site before the edge loss
        assert abs(kept - want) < 4 * math.sqrt(want * (1 - want) / n) + 0.01, (name, kept, want)
        rates[name] = kept
    assert rates["edge"] / rates["axis"] == pytest.approx(0.5 / 0.95, abs=0.07)
    # every kind of ion is thinned, and the per-ion truth stays with its ion
    for kind, share in (("organic_ions", 0.75), ("background_ions", 0.75)):
        n0 = ideal.truth["counts"][kind]
        assert abs(run.truth["counts"][kind] / n0 - share) < 4 * math.sqrt(share * (1 - share) / n0), kind
    metal = run.ion_rod >= 0
    assert metal.sum() == run.truth["counts"]["metal_ions"] and run.ions.n_ions == run.truth["counts"]["ions"]
    assert (run.ion_metal[metal] == run.seq[run.ion_rod[metal], run.ion_site[metal]]).all()
    off_axis = np.hypot(run.ions.x[metal] - run.rod_xy_nm[run.ion_rod[metal], 0],
                        run.ions.y[metal] - run.rod_xy_nm[run.ion_rod[metal], 1])
    assert off_axis.max() < 6 * 0.05
    n_metal_species = len(run.config.branching) * len(run.config.metals)
    assert (run.ion_species[metal] < n_metal_species).all()
    assert (run.ion_species[~metal] >= n_metal_species).sum() == run.truth["counts"]["organic_ions"]
    assert (run.ion_species == -1).sum() == run.truth["counts"]["background_ions"]
    est = SimConfig(**cfg, edge_efficiency=0.5).expected_size()["ions"]
    assert 0.7 < est / run.ions.n_ions < 1.4


# ---------------------------------------------------------------------- checks and command line
@pytest.mark.parametrize("field,value,option", [
    ("depth_scale", 2.5, "--depth-scale"), ("depth_scale", float("nan"), "--depth-scale"),
    ("depth_scale_change", 0.6, "--depth-scale-change"), ("plane_curvature_per_nm", -0.1, "--plane-curvature"),
    ("magnification_change", 0.5, "--magnification-change"), ("edge_efficiency", 0.0, "--edge-efficiency"),
    ("edge_efficiency", 1.2, "--edge-efficiency"), ("depth_scale", "1.1", "--depth-scale"),
])
def test_out_of_range_artefacts_are_refused_by_option(field, value, option):
    with pytest.raises(InputError, match=option) as e:
        SimConfig(**{field: value})
    assert "\n" not in str(e.value)


def test_cli_passes_the_artefacts_to_the_truth(tmp_path, capsys):
    out = tmp_path / "a.csv"
    code = main(["simulate", str(out), "--depth", "6", "--tip-radius", "3", "-q", "--depth-scale", "1.1",
                 "--depth-scale-change", "-0.2", "--plane-curvature", "0.01", "--magnification-change", "0.1",
                 "--edge-efficiency", "0.8"])
    assert code == 0, capsys.readouterr().err
    truth = json.loads(out.with_suffix(".truth.json").read_text())
    want = {"depth_scale": 1.1, "depth_scale_change": -0.2, "plane_curvature_per_nm": 0.01,
            "magnification_change": 0.1, "edge_efficiency": 0.8}
    assert {k: truth["reconstruction"][k] for k in want} == want
    assert {k: truth["config"][k] for k in want} == want
    assert truth["reconstruction"]["plane_sag_at_top_radius_nm"] == pytest.approx(0.01 * 9)
    assert all("axis_xy_nm" in r and "z_ideal_nm" in r for r in truth["rods"])
    code = main(["simulate", str(tmp_path / "b.csv"), "--edge-efficiency", "0"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 1 and len(err) == 1 and err[0].startswith("error: --edge-efficiency")
    assert not (tmp_path / "b.csv").exists()
