"""Registration, assignment, mask and binning of the columns stage, on synthetic lattices of known truth."""

import json
import math

import numpy as np
import pytest
from scipy.special import erf

from probeseq import InputError, Lattice
from probeseq.lattice.columns import ColumnBinner, assign_rods, build_columns
from probeseq.lattice.geometry import plan_columns, rod_site_depths
from probeseq.lattice.registration import RESOLVABLE_MISASSIGNED, expected_misassigned_fraction, register_lattice
from probeseq.lattice.rodcolumns import RodColumns


# ---------------------------------------------------------------------- generator
def make_sample(lattice, *, rotation_deg, scale, offset, tilt, sigma, seed, top_radius=7.0, half_angle=8.0,
                depth=25.0, eta=0.5, site_phase=0.3, background=0.0):
    """Metal ions of a needle cut from a lattice placed by (rotation, scale, offset, tilt).

    Returns x, y, z, the true rod axes at z=0 (recon frame, nm), the true rod of each ion, the
    (rod, site) inside table and the (rod, site) site depths.
    """
    rng = np.random.default_rng(seed)
    th = math.radians(rotation_deg)
    A = scale * np.array([[math.cos(th), -math.sin(th)], [math.sin(th), math.cos(th)]])
    tilt = np.asarray(tilt, float)
    offset = np.asarray(offset, float)
    r_max = top_radius + depth * math.tan(math.radians(half_angle))
    q = lattice.rod_positions((r_max + np.abs(offset).max() + np.abs(tilt).max() * depth) / scale + 2 * lattice.a_nm,
                              center_nm=-np.linalg.solve(A, offset))
    rod_xy = q @ A.T + offset
    # sites lie in crystal planes perpendicular to the tilted rods. The crystal tilt is
    # t_c = A^-1 t; planes t_c . q + zeta = c with q = A^-1 (xy - offset), i.e. z + g . xy = u with
    # g = t / scale^2, spaced pitch * sqrt(1 + |t_c|^2) in u (plain geometry)
    t_c = np.linalg.solve(A, tilt)
    g = tilt / scale ** 2
    tt = 1.0 + float(t_c @ t_c)
    u_k = (np.arange(int(depth / lattice.pitch_nm)) + site_phase) * lattice.pitch_nm * math.sqrt(tt)
    site_z = (u_k[None, :] - (rod_xy @ g)[:, None]) / tt  # (n_rods, n_sites)
    axis = rod_xy[:, None, :] + tilt[None, None, :] * site_z[:, :, None]
    radius = top_radius + site_z * math.tan(math.radians(half_angle))
    inside = (np.sqrt((axis ** 2).sum(-1)) < radius) & (site_z >= 0) & (site_z <= depth)
    keep = inside.any(1)
    rod_xy, axis, inside, site_z = rod_xy[keep], axis[keep], inside[keep], site_z[keep]
    det = inside & (rng.random(inside.shape) < eta)
    r, s = np.nonzero(det)
    xy = axis[r, s] + rng.normal(0, sigma, (r.size, 2))
    z = site_z[r, s] + rng.normal(0, 0.03, r.size)
    if background:
        nb = int(background * r.size)
        zb = rng.uniform(0, depth, nb)
        rb = (top_radius + zb * math.tan(math.radians(half_angle))) * np.sqrt(rng.random(nb))
        ab = rng.uniform(0, 2 * math.pi, nb)
        xy = np.vstack([xy, np.column_stack([rb * np.cos(ab), rb * np.sin(ab)])])
        z = np.concatenate([z, zb])
        r = np.concatenate([r, np.full(nb, -1)])
    return xy[:, 0], xy[:, 1], z, rod_xy, r, inside, site_z


HONEY = Lattice.from_preset("honeycomb", a=2.6, repeat=0.68, sites_per_repeat=3)
SQUARE = Lattice.from_preset("square", a=1.2, repeat=0.68, sites_per_repeat=3)
TRUTH = {
    "honeycomb": dict(rotation_deg=37.3, scale=1.031, offset=(0.41, -0.77), tilt=(0.021, -0.012), sigma=0.12),
    "square": dict(rotation_deg=112.6, scale=0.972, offset=(-0.3, 0.52), tilt=(-0.015, 0.025), sigma=0.12),
}


@pytest.fixture(scope="module", params=["honeycomb", "square"])
def case(request):
    lat = HONEY if request.param == "honeycomb" else SQUARE
    t = TRUTH[request.param]
    sample = make_sample(lat, seed=11, **t)
    reg = register_lattice(*sample[:3], lat, random_state=0)
    return request.param, lat, t, sample, reg


def _rod_match(fit_xy, true_xy):
    d = np.sqrt(((true_xy[:, None, :] - fit_xy[None, :, :]) ** 2).sum(-1))
    return d.min(1), d.argmin(1)


# ---------------------------------------------------------------------- registration
def test_registration_recovers_distortion(case):
    name, lat, t, sample, reg = case
    period = 360.0 / reg.symmetry_order
    assert reg.symmetry_order == (6 if name == "honeycomb" else 4)
    assert 0 <= reg.rotation_deg < period
    # rotation compared modulo the pattern's symmetry
    dr = (reg.rotation_deg - t["rotation_deg"] + period / 2) % period - period / 2
    assert abs(dr) < 0.1
    assert reg.scale == pytest.approx(t["scale"], rel=2e-3)
    assert np.allclose(reg.tilt, t["tilt"], atol=math.radians(0.05))
    # offset modulo lattice translations and symmetry: the fitted rods sit on the true rods
    dmin, _ = _rod_match(reg.rod_positions(15.0), sample[3])
    inner = np.hypot(*sample[3].T) < 10
    assert dmin[inner].max() < 0.02 * lat.nearest_rod_distance_nm * t["scale"]
    # the offset is reduced into the unit cell
    fo = np.linalg.solve(reg.transform @ lat.cell_matrix, reg.offset_nm)
    assert ((fo >= -1e-9) & (fo < 1 + 1e-9)).all()
    # the reported errors are small but positive, and the truth lies within a few of them
    assert 0 < reg.scale_err < 2e-3 and abs(reg.scale - t["scale"]) < 6 * reg.scale_err + 1e-4
    assert 0 < reg.rotation_deg_err < 0.1
    assert (reg.tilt_err > 0).all()
    assert reg.sigma_xy_nm == pytest.approx(t["sigma"], rel=0.06)
    assert reg.quality > 0.7 and reg.peak_ratio > 20
    assert reg.resolvable and reg.misassigned_fraction < RESOLVABLE_MISASSIGNED
    d = json.loads(json.dumps(reg.to_dict()))
    assert d["rotation_period_deg"] == period and d["fixed"] == []


def test_registration_overrides(case):
    name, lat, t, sample, reg = case
    fixed = register_lattice(*sample[:3], lat, rotation_deg=reg.rotation_deg + 0.0, scale=t["scale"],
                             random_state=0)
    assert fixed.rotation_deg == reg.rotation_deg and fixed.scale == t["scale"]
    assert fixed.rotation_deg_err == 0 and fixed.scale_err == 0
    assert set(fixed.fixed) == {"rotation_deg", "scale"}
    dmin, _ = _rod_match(fixed.rod_positions(10.0), sample[3])
    assert np.median(dmin) < 0.02
    # everything fixed: the given placement is kept exactly (offset reduced modulo the lattice)
    allfix = register_lattice(*sample[:3], lat, rotation_deg=reg.rotation_deg, scale=reg.scale,
                              offset_nm=reg.offset_nm, tilt=reg.tilt)
    assert np.allclose(allfix.offset_nm, reg.offset_nm) and np.allclose(allfix.tilt, reg.tilt)
    assert allfix.quality == pytest.approx(reg.quality, abs=1e-9)


def test_wrong_offset_override_lowers_quality(case):
    name, lat, t, sample, reg = case
    half = np.array([0.6, 0.8]) * 0.5 * lat.nearest_rod_distance_nm * reg.scale
    bad = register_lattice(*sample[:3], lat, rotation_deg=reg.rotation_deg, scale=reg.scale,
                           offset_nm=reg.offset_nm + half, tilt=reg.tilt)
    assert bad.quality < 0.3 < 0.7 < reg.quality


def test_crosstalk_square_matches_analytic():
    # source: a 2-D isotropic Gaussian factorises, so the share inside the square Voronoi cell of
    # half-width a/2 is erf(a / (2 sqrt(2) sigma))^2 (textbook Gaussian integral, recalled from memory)
    for sigma in (0.2, 0.35, 0.5):
        exact = 1 - erf(1.2 / (2 * math.sqrt(2) * sigma)) ** 2
        assert expected_misassigned_fraction(SQUARE, sigma) == pytest.approx(exact, rel=1e-5, abs=1e-9)
    assert expected_misassigned_fraction(SQUARE, 0.0) == 0.0
    assert math.isnan(expected_misassigned_fraction(SQUARE, float("nan")))


def _crosstalk_monte_carlo(lat, sigma, n, seed):
    """Independent check: Gaussian points around each basis rod, nearest rod by brute force."""
    rng = np.random.default_rng(seed)
    C = lat.cell_matrix
    ij = np.arange(-3, 4)
    shifts = np.stack(np.meshgrid(ij, ij, indexing="ij"), -1).reshape(-1, 1, 2)
    rods = ((lat.rods_frac[None] + shifts).reshape(-1, 2)) @ C.T
    wrong = 0
    for b in range(lat.rods_per_cell):
        own = lat.rods_frac[b] @ C.T
        pts = own + rng.normal(0, sigma, (n, 2))
        d2 = ((pts[:, None, :] - rods[None, :, :]) ** 2).sum(-1)
        wrong += int((np.linalg.norm(rods[d2.argmin(1)] - own, axis=1) > 1e-9).sum())
    return wrong / (n * lat.rods_per_cell)


OBLIQUE = Lattice(a_nm=2.1, b_nm=1.7, gamma_deg=75.0, rods_frac=np.array([[0.0, 0.0], [0.45, 0.3], [0.2, 0.7]]),
                  repeat_nm=0.68, sites_per_repeat=3, name="oblique test cell")


@pytest.mark.parametrize("lat", [HONEY, Lattice.from_preset("triangular", a=1.5, repeat=0.68, sites_per_repeat=3),
                                 OBLIQUE], ids=["honeycomb", "triangular", "oblique"])
def test_crosstalk_matches_monte_carlo(lat):
    # the quadrature against points drawn and assigned to their nearest rod (binomial error)
    for sigma in (0.25, 0.45):
        n = 40_000
        mc = _crosstalk_monte_carlo(lat, sigma, n, seed=5)
        se = math.sqrt(mc * (1 - mc) / (n * lat.rods_per_cell))
        assert expected_misassigned_fraction(lat, sigma) == pytest.approx(mc, abs=4 * se + 1e-4)


def test_crosstalk_honeycomb_small_sigma_limit():
    # three nearest neighbours at d: for small sigma the share is close to 3 * P(N(0,1) > d/(2 sigma))
    # (half-plane tails of the three Voronoi edges; the corners add a little less than their overlap)
    sigma, d = 0.2, HONEY.nearest_rod_distance_nm
    tail = 0.5 * (1 - erf(d / (2 * sigma) / math.sqrt(2)))
    xt = expected_misassigned_fraction(HONEY, sigma)
    assert 2.6 * tail < xt < 3.0 * tail + 1e-6


def test_blurred_data_not_resolvable():
    x, y, z, *_ = make_sample(HONEY, seed=3, rotation_deg=10, scale=1.0, offset=(0, 0), tilt=(0, 0),
                              sigma=0.42, depth=15)
    reg = register_lattice(x, y, z, HONEY, rotation_deg=10, scale=1.0, offset_nm=(0, 0), tilt=(0, 0))
    assert reg.sigma_xy_nm > 0.3 and reg.misassigned_fraction > RESOLVABLE_MISASSIGNED and not reg.resolvable


def test_registration_with_background_and_subsample():
    t = TRUTH["square"]
    x, y, z, rod_xy, *_ = make_sample(SQUARE, seed=5, background=0.2, **t)
    reg = register_lattice(x, y, z, SQUARE, random_state=1, max_fit_ions=8000)
    assert reg.n_fit == 8000 and reg.n_ions == x.size
    assert reg.scale == pytest.approx(t["scale"], rel=3e-3)
    assert 0.1 < reg.background_fraction < 0.35
    dmin, _ = _rod_match(reg.rod_positions(8.0), rod_xy)
    assert np.median(dmin) < 0.03


def test_crowded_rods_at_the_outline_do_not_shrink_the_scale():
    """Rods 0.5 nm apart with a 0.2 nm blur in a 7 nm needle: the nearest-rod fit pulls the rods at
    the outline inwards (their outer neighbours are missing), which read the scale 1.7 % small
    before the crowded placement was refitted on the rods away from the outline."""
    from probeseq.simulation.simulate import simulate_run

    run = simulate_run(pattern="random", metals=("Co", "Ni", "Zn"), packing="honeycomb", a_nm=1.5, repeat_nm=0.68,
                       top_radius_nm=7.0, depth_nm=24.0, eta=0.6, sigma_xy_nm=0.2, seed=6)
    sel = run.ion_metal >= 0
    reg = register_lattice(run.ions.x[sel], run.ions.y[sel], run.ions.z[sel], run.lattice, random_state=1)
    assert reg.misassigned_fraction > 0.05  # crowded
    assert reg.scale == pytest.approx(run.truth["distortion"]["scale"], rel=2e-3)


# ---------------------------------------------------------------------- columns
def _oracle(x, y, z, rod_xy, tilt):
    out = np.empty(x.size, int)
    for s in range(0, x.size, 4000):
        ax = rod_xy[None] + np.asarray(tilt)[None, None, :] * z[s:s + 4000, None, None]
        d = (x[s:s + 4000, None] - ax[..., 0]) ** 2 + (y[s:s + 4000, None] - ax[..., 1]) ** 2
        out[s:s + 4000] = d.argmin(1)
    return out


def test_assignment_near_best_possible(case):
    name, lat, t, (x, y, z, rod_xy, true_rod, inside, site_z), reg = case
    geom = plan_columns(x, y, z, reg)
    rod, site = assign_rods(x, y, z, geom)
    dmin, match = _rod_match(rod_xy, geom.rod_xy_nm)  # for each of our rods, the true one
    assert dmin.max() < 0.03
    ours = np.where(rod >= 0, match[np.maximum(rod, 0)], -1)
    best = _oracle(x, y, z, rod_xy, t["tilt"])
    used = np.isin(true_rod, match)
    acc, acc_best = (ours[used] == true_rod[used]).mean(), (best[used] == true_rod[used]).mean()
    assert acc > acc_best - 0.01
    # assignment is exactly nearest-axis with the fitted geometry
    fit_best = _oracle(x, y, z, geom.rod_xy_nm - reg.tilt * reg.z_ref_nm, reg.tilt)
    ok = rod >= 0
    assert (fit_best[ok] == rod[ok]).all()


def test_mask_follows_needle(case):
    name, lat, t, (x, y, z, rod_xy, true_rod, inside, site_z), reg = case
    geom = plan_columns(x, y, z, reg)
    dmin, match = _rod_match(rod_xy, geom.rod_xy_nm)
    # site k of every rod is one crystal plane: a single index offset maps our sites to the truth
    dz = lat.pitch_nm / math.sqrt(1 + float(np.dot(t["tilt"], t["tilt"])) / t["scale"] ** 2)
    ours_z = geom.rod_site_z_nm
    k_off = np.rint((ours_z[:, 0] - site_z[match, 0]) / dz).astype(int)
    assert (k_off == k_off[0]).all()
    k = np.arange(geom.n_sites) + k_off[0]
    valid = (k >= 0) & (k < site_z.shape[1])
    assert np.abs(ours_z[:, valid] - site_z[match][:, k[valid]]).max() < 0.01
    assert np.abs(rod_site_depths(build_columns(x, y, z, np.ones((x.size, 1)), ("Co",), lat, registration=reg))
                  - ours_z).max() < 1e-9
    truth = np.zeros_like(geom.mask)
    truth[:, valid] = inside[match][:, k[valid]]
    m = geom.mask
    assert (m & ~truth).sum() <= 0.01 * m.sum()  # used sites are inside the true needle
    assert (m & truth).sum() >= 0.9 * inside.sum()  # and cover nearly all of it
    # the needle widens with depth: more rods are used at the bottom than at the top
    used = np.flatnonzero(m.any(0))
    assert m[:, used[-5:]].sum() > 1.3 * m[:, used[:5]].sum()
    # every rod wholly inside the true needle by a margin of one rod spacing is used throughout
    r_true = 7.0 + site_z * math.tan(math.radians(8.0))
    axis = rod_xy[:, None, :] + np.asarray(t["tilt"]) * site_z[:, :, None]
    deep = np.sqrt((axis ** 2).sum(-1))
    well = ((deep < r_true - lat.nearest_rod_distance_nm) | ~inside).all(1) & inside.all(1)
    ours_of_true = {int(match[i]): i for i in range(match.size)}
    assert well.sum() > 10
    for r in np.flatnonzero(well):
        assert r in ours_of_true
        i = ours_of_true[r]
        assert m[i, valid].all()
    # the outline radius follows the true cone within a rod spacing
    zs = np.linspace(2, 23, 30)
    rz = np.interp(zs, geom.outline_z_nm, geom.outline_radius_nm)
    assert np.abs(rz - (7.0 + zs * math.tan(math.radians(8.0)))).max() < lat.nearest_rod_distance_nm * 1.5


def test_build_columns_counts(case):
    name, lat, t, (x, y, z, rod_xy, true_rod, inside, site_z), reg = case
    rng = np.random.default_rng(0)
    metal = rng.integers(0, 3, x.size)
    W = np.eye(3)[metal] * 0.9 + 0.1 / 3
    col = build_columns(x, y, z, W, ("Co", "Zn", "Ni"), lat, registration=reg)
    assert isinstance(col, RodColumns)
    assert col.counts.shape == (col.n_rods, col.n_sites, 3) and col.mask.shape == col.counts.shape[:2]
    st = col.params["ions"]
    assert st["n_binned"] + st["n_beyond_cutoff"] + st["n_unused_rod"] + st["n_outside_depth"] == x.size
    assert col.counts.sum() == pytest.approx(st["n_binned"], rel=1e-9)
    # channel indices give the same counts as one-hot weights; chunked adds equal one add
    geom = plan_columns(x, y, z, reg)
    b1 = ColumnBinner(geom, 3).add(x, y, z, metal)
    b2 = ColumnBinner(geom, 3)
    for s in range(0, x.size, 3001):
        b2.add(x[s:s + 3001], y[s:s + 3001], z[s:s + 3001], np.eye(3)[metal[s:s + 3001]])
    assert np.array_equal(b1.counts, b2.counts)
    b3 = ColumnBinner(geom, 3).add(x.astype(np.float32), y.astype(np.float32), z.astype(np.float32), metal)
    assert np.abs(b3.counts - b1.counts).sum() <= 2e-4 * x.size  # float32 input: a few boundary ions move
    # the counts of each rod are its own ions: compare with a direct tally
    rod, site = assign_rods(x, y, z, geom)
    ok = rod >= 0
    direct = np.zeros((geom.n_rods, geom.n_sites, 3))
    np.add.at(direct, (rod[ok], site[ok], metal[ok]), 1)
    assert np.array_equal(direct, b1.counts)
    # mean counts per used site ~ detection efficiency (0.5 ions per site)
    per_site = col.counts.sum(-1)[col.mask].mean()
    assert 0.4 < per_site < 0.6
    json.dumps(col.params)
    assert col.params["columns"]["site_phase_contrast"] > 0.3
    # honeycomb: interior rods have 3 nearest neighbours; square: 4
    deg = np.bincount(col.neighbours.ravel(), minlength=col.n_rods)
    assert deg.max() == (3 if name == "honeycomb" else 4)
    assert (col.neighbours[:, 0] < col.neighbours[:, 1]).all()
    d = np.sqrt(((col.rod_xy_nm[col.neighbours[:, 0]] - col.rod_xy_nm[col.neighbours[:, 1]]) ** 2).sum(1))
    assert np.allclose(d, lat.nearest_rod_distance_nm * reg.scale, rtol=1e-6)


def test_cutoff_excludes_far_ions():
    t = TRUTH["honeycomb"]
    x, y, z, rod_xy, *_ = make_sample(HONEY, seed=2, background=0.3, **t)
    reg = register_lattice(x, y, z, HONEY, random_state=0)
    g_small = plan_columns(x, y, z, reg, cutoff_frac=0.3)
    g_big = plan_columns(x, y, z, reg, cutoff_frac=1.2)
    W = np.ones((x.size, 1))
    s_small = ColumnBinner(g_small, 1).add(x, y, z, W).stats()
    s_big = ColumnBinner(g_big, 1).add(x, y, z, W).stats()
    assert s_small["n_beyond_cutoff"] > s_big["n_beyond_cutoff"]
    assert s_big["n_beyond_cutoff"] == 0  # 1.2 d_nn covers the whole honeycomb Voronoi cell (corner at d_nn)
    rod, _ = assign_rods(x, y, z, g_small)
    f1, f2 = reg.to_frac(x, y, z)
    _, _, _, d2 = g_small.locator.nearest_exact(f1, f2)
    assert (np.sqrt(d2[rod >= 0]) <= 0.3 * HONEY.nearest_rod_distance_nm + 1e-9).all()


def test_simulated_run(small_run):
    run = small_run
    m = run.ion_metal >= 0
    W = np.eye(len(run.truth["metals"]))[run.ion_metal[m]]
    col = build_columns(run.ions.x[m], run.ions.y[m], run.ions.z[m], W, run.truth["metals"], run.lattice,
                        random_state=0)
    dist = run.truth["distortion"]
    reg = col.params["registration"]
    assert reg["scale"] == pytest.approx(dist["scale"], rel=0.01)
    dmin, _ = _rod_match(col.rod_xy_nm - col.tilt * col.z_ref_nm, run.rod_xy_nm)
    assert np.median(dmin) < 0.05


# ---------------------------------------------------------------------- errors
def test_error_too_few_ions(rng):
    with pytest.raises(InputError, match="too few metal ions"):
        register_lattice(rng.normal(size=100), rng.normal(size=100), rng.normal(size=100), HONEY)


def test_error_no_lattice_signal(rng):
    n = 40_000
    r = 8 * np.sqrt(rng.random(n))
    a = rng.uniform(0, 2 * np.pi, n)
    with pytest.raises(InputError) as e:
        register_lattice(r * np.cos(a), r * np.sin(a), rng.uniform(0, 20, n), HONEY, random_state=0)
    msg = str(e.value)
    assert "no lattice signal" in msg and "--rotation-deg" in msg and "--offset-nm" in msg
    assert "best match rotation" in msg and "scale 0.8-1.25" in msg and "\n" not in msg


def test_error_specimen_narrower_than_cell(rng):
    n = 5000
    with pytest.raises(InputError, match="narrower than one cell|too narrow"):
        register_lattice(rng.normal(0, 0.3, n), rng.normal(0, 0.3, n), rng.uniform(0, 20, n), HONEY)


def test_error_bad_inputs(case):
    name, lat, t, (x, y, z, *_), reg = case
    with pytest.raises(InputError, match="equal lengths"):
        register_lattice(x, y[:-1], z, lat)
    with pytest.raises(InputError, match="NaN"):
        register_lattice(np.where(np.arange(x.size) == 3, np.nan, x), y, z, lat)
    with pytest.raises(InputError, match="--scale must be positive"):
        register_lattice(x, y, z, lat, scale=-1.0)
    with pytest.raises(InputError, match="--offset-nm must be 2"):
        register_lattice(x, y, z, lat, offset_nm=(1.0,))
    with pytest.raises(InputError, match="must be a probeseq Lattice"):
        register_lattice(x, y, z, "honeycomb")
    with pytest.raises(InputError, match="columns for 2 metals"):
        build_columns(x, y, z, np.ones((x.size, 3)), ("Co", "Zn"), lat, registration=reg)
    with pytest.raises(InputError, match="rows for"):
        build_columns(x, y, z, np.ones((x.size - 1, 2)), ("Co", "Zn"), lat, registration=reg)
    geom = plan_columns(x, y, z, reg)
    with pytest.raises(InputError, match="channel indices"):
        ColumnBinner(geom, 2).add(x, y, z, np.full(x.size, 5))
    with pytest.raises(InputError, match="cutoff_frac"):
        plan_columns(x, y, z, reg, cutoff_frac=0)


def test_figure(case, tmp_path):
    import matplotlib
    import matplotlib.pyplot as plt

    from probeseq.lattice.plot import plot_rod_density

    name, lat, t, (x, y, z, *_), reg = case
    col = build_columns(x, y, z, np.ones((x.size, 1)), ("Co",), lat, registration=reg)
    backend, figs = matplotlib.get_backend(), plt.get_fignums()
    for suffix in (".png", ".svg"):
        p = plot_rod_density(x, y, z, col, tmp_path / f"d{suffix}")
        assert p.stat().st_size > 5000
    # drawn without pyplot: the user's backend is not switched and no figure is left open
    assert matplotlib.get_backend() == backend and plt.get_fignums() == figs
    with pytest.raises(InputError, match="suffix"):
        plot_rod_density(x, y, z, col, tmp_path / "d.pdf")


def test_compact_counts_only_when_exact():
    from probeseq.lattice.columns import compact_counts

    rng = np.random.default_rng(0)
    whole = rng.poisson(0.7, size=(30, 40, 2)).astype(float)
    c = compact_counts(whole)
    assert c.dtype == np.float32 and np.array_equal(c, whole)
    for bad in (0.5, -1.0, np.nan, 2.0 ** 24):  # split ions, negative, non-finite, not exact in float32
        x = whole.copy()
        x[7, 3, 1] = bad
        assert compact_counts(x) is x


def test_params_read_only(tmp_path):
    """A frozen RodColumns keeps its params: changes raise, a changed copy is a new object."""
    import dataclasses
    import pickle

    from probeseq.lattice.rodcolumns import load_columns, save_columns

    cols = RodColumns(counts=np.zeros((1, 2, 1)), mask=np.ones((1, 2), bool), metals=("Zn",),
                      rod_xy_nm=[[0.0, 0.0]], tilt=[0.0, 0.0], z_ref_nm=0.0, site_z_nm=[0.0, 1.0], pitch_nm=1.0,
                      params={"registration": {"scale": 1.0}, "ions": {"n_ions": 3}})
    with pytest.raises(TypeError):
        cols.params["visibility"] = {}
    with pytest.raises(TypeError):
        cols.params["registration"]["scale"] = 2.0
    with pytest.raises(TypeError):
        cols.params.update(a=1)
    more = dataclasses.replace(cols, params={**cols.params, "visibility": {"Zn": 1.0}})
    assert "visibility" not in cols.params and more.params["visibility"] == {"Zn": 1.0}
    assert pickle.loads(pickle.dumps(more)).params == more.params
    assert json.loads(json.dumps(more.params)) == more.params
    save_columns(more, tmp_path / "c.h5")
    assert load_columns(tmp_path / "c.h5").params == more.params
    with pytest.raises(InputError):
        RodColumns(counts=np.zeros((1, 2, 1)), mask=np.ones((1, 2), bool), metals=("Zn",), rod_xy_nm=[[0.0, 0.0]],
                   tilt=[0.0, 0.0], z_ref_nm=0.0, site_z_nm=[0.0, 1.0], pitch_nm=1.0, params=[1])
