"""The simulator against its own formulas, each within its binomial (or Monte Carlo) error."""

import numpy as np
import periodictable as pt
import pytest

from probeseq import InputError
from probeseq.simulation.simulate import SimConfig, ion_lines, simulate_run


@pytest.fixture(scope="module")
def big_random():
    return simulate_run(pattern="random", metals=("Ni", "Zn"), composition=(0.3, 0.7),
                        top_radius_nm=7, depth_nm=30, seed=11)


def test_composition_within_binomial_error(big_random):
    seq = big_random.seq[big_random.seq >= 0]
    n = seq.size
    f_hat = (seq == 0).mean()
    assert abs(f_hat - 0.3) < 4 * np.sqrt(0.3 * 0.7 / n)


def test_detection_efficiency_within_binomial_error(big_random):
    n_sites = int((big_random.seq >= 0).sum())
    n_metal = int((big_random.ion_metal >= 0).sum())
    eta = big_random.config.eta
    assert abs(n_metal / n_sites - eta) < 4 * np.sqrt(eta * (1 - eta) / n_sites)


@pytest.mark.parametrize("lam", [0.5, 0.85])
def test_mean_run_length_follows_markov_formula(lam):
    # mean run length of metal k: 1 / ((1 - lam)(1 - f_k)); runs cut by the rod ends bias it low, so
    # use long rods (deep, narrow needle) and compare within 5 %.
    run = simulate_run(pattern="long-block", persistence=lam, composition=(0.4, 0.6), top_radius_nm=3,
                       half_angle_deg=0, depth_nm=400, seed=5)
    for k, f in enumerate((0.4, 0.6)):
        expected = 1 / ((1 - lam) * (1 - f))
        lengths = []
        for row in run.seq:
            s = row[row >= 0]
            is_k = np.concatenate([[0], (s == k).astype(int), [0]])
            d = np.diff(is_k)
            lengths.append(np.flatnonzero(d == -1) - np.flatnonzero(d == 1))
        mean = np.concatenate(lengths).mean()
        assert abs(mean / expected - 1) < 0.06, (k, mean, expected)


def test_isotope_fractions_match_periodictable(big_random):
    # source: periodictable 2.x isotope table (AME2020 masses, CIAAW-2021 abundance midpoints)
    sp = big_random.truth["species"]
    ni_plus = [i for i, s in enumerate(sp) if s["formula"] == "Ni" and s["charge"] == 1][0]
    mz = big_random.ions.mass_to_charge[big_random.ion_species == ni_plus]
    iso = [(i.isotope, i.mass, i.abundance / 100) for i in pt.Ni if i.abundance > 0]
    total = sum(a for _, _, a in iso)
    for a_num, mass, ab in iso:
        p = ab / total
        frac = np.mean(np.abs(mz - mass) < 0.45)
        assert abs(frac - p) < 4 * np.sqrt(p * (1 - p) / mz.size) + 0.003, (a_num, frac, p)


def test_ion_lines_named_values():
    # m/z as neutral isotope mass / charge; check values from periodictable (run here, see
    # docs/REFERENCES.md §1: Co2+ 29.4666, CoO+ 74.9281)
    m, p = ion_lines("Co", 2)
    assert m.size == 1 and abs(m[0] - 29.4666) < 1e-4
    m, p = ion_lines("CoO", 1)
    assert abs(m[np.argmax(p)] - 74.9281) < 1e-4
    assert abs(p.sum() - 1) < 1e-12


def test_copied_rods_share_master_within_copy_error():
    run = simulate_run(pattern="copied", copy_error=0.1, top_radius_nm=5, depth_nm=20, seed=3)
    seq = run.seq
    # the master is the per-site majority; mismatches = copy_error * (1 - P(fresh draw equals master))
    both = (seq[0] >= 0)
    master = np.array([np.bincount(c[c >= 0], minlength=2).argmax() if (c >= 0).any() else -1 for c in seq.T])
    inside = seq >= 0
    mism = (seq != master[None, :]) & inside
    rate = mism.sum() / inside.sum()
    assert abs(rate - 0.1 * 0.5) < 0.01


def test_distortion_maps_rod_axes():
    run = simulate_run(pattern="random", rotation_deg=30.0, scale=1.02, offset_nm=(0.5, -0.3), tilt_deg=1.0,
                       tilt_azimuth_deg=0.0, top_radius_nm=4, depth_nm=8, seed=1)
    d = run.lattice.nearest_rod_distance_nm * 1.02
    xy = run.rod_xy_nm
    dist = np.sqrt(((xy[:, None] - xy[None]) ** 2).sum(-1))
    dist[dist == 0] = np.inf
    assert abs(np.median(dist.min(1)) - d) < 1e-4 * d  # horizontal section of tilted axes: O(tilt^2)
    # the tilt is applied to the crystal (azimuth 0 in its frame), then the reconstruction's rotation
    # (30 deg) and lateral scale act on it
    t = 1.02 * np.tan(np.radians(1.0))
    np.testing.assert_allclose(run.rod_tilt, [t * np.cos(np.radians(30)), t * np.sin(np.radians(30))], rtol=1e-9)


def test_site_planes_perpendicular_to_tilted_rods():
    run = simulate_run(pattern="random", rotation_deg=0.0, scale=1.0, tilt_deg=2.0, tilt_azimuth_deg=0.0,
                       top_radius_nm=4, depth_nm=8, seed=1)
    # site k of every rod lies on one plane perpendicular to the rod direction (t, 0, 1):
    # z_site + t * x_site is the same for all rods (x at the site's own depth)
    t = run.rod_tilt[0]
    k = run.seq.shape[1] // 2
    z = run.site_z_nm[:, k]
    x = run.rod_xy_nm[:, 0] + t * z
    plane = z + t * x
    assert np.ptp(plane) < 1e-9 and np.ptp(z) > 0.05


def test_metal_ions_sit_near_their_rod_axis():
    run = simulate_run(pattern="random", sigma_xy_nm=0.1, helix_radius_nm=0.0, top_radius_nm=5, depth_nm=10, seed=2)
    sel = run.ion_rod >= 0
    axis = run.rod_xy_nm[run.ion_rod[sel]] + run.rod_tilt * run.ions.z[sel][:, None]
    r2 = ((np.column_stack([run.ions.x[sel], run.ions.y[sel]]) - axis) ** 2).sum(1)
    # 2-D Gaussian blur: E[r^2] = 2 sigma^2 (depth blur moves z a little, so allow 5 %)
    assert abs(r2.mean() / (2 * 0.1 ** 2) - 1) < 0.05


def test_bad_config():
    with pytest.raises(InputError, match="--pattern"):
        SimConfig(pattern="stripes")
    with pytest.raises(InputError, match="at least two metals"):
        SimConfig(metals=("Co",))
    with pytest.raises(InputError, match="eta"):
        SimConfig(eta=1.5)


def test_same_seed_same_run():
    a = simulate_run(top_radius_nm=3, depth_nm=5, seed=9)
    b = simulate_run(top_radius_nm=3, depth_nm=5, seed=9)
    np.testing.assert_array_equal(a.ions.mass_to_charge, b.ions.mass_to_charge)
    assert a.truth == b.truth
