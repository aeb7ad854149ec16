"""Lattice geometry against textbook crystallography, TOML schema errors, symmetry, nearest-rod lookup."""

import math

import numpy as np
import pytest

from probeseq import InputError, Lattice
from probeseq.lattice.locator import RodLocator, lattice_symmetry


# ---------------------------------------------------------------------- textbook geometry
# source: textbook geometry of 2-D nets (recalled from memory): the honeycomb net drawn in a
# hexagonal cell of edge a has 6 nodes per cell, nearest node distance a/3 (the honeycomb of edge
# a/3 inside the hexagonal supercell of edge a), coordination 3; the triangular net has 1 node per
# cell, distance a, coordination 6; the square net 1 node, distance a, coordination 4. Hexagonal
# cell area a^2 sqrt(3)/2.
@pytest.mark.parametrize("a", [2.6, 3.1])
def test_honeycomb_geometry(a):
    lat = Lattice.from_preset("honeycomb", a=a, repeat=0.68)
    assert lat.rods_per_cell == 6
    assert lat.nearest_rod_distance_nm == pytest.approx(a / 3, rel=1e-9)
    assert lat.cell_area_nm2 == pytest.approx(a * a * math.sqrt(3) / 2, rel=1e-12)
    assert lat.rod_density_per_nm2 == pytest.approx(6 / (a * a * math.sqrt(3) / 2), rel=1e-12)
    assert _coordination(lat) == 3
    # the honeycomb net of edge d has node density 4 / (3 sqrt(3) d^2)  (same source)
    d = a / 3
    assert lat.rod_density_per_nm2 == pytest.approx(4 / (3 * math.sqrt(3) * d * d), rel=1e-9)


def test_triangular_and_square_geometry():
    tri = Lattice.from_preset("triangular", a=1.5, repeat=0.6)
    assert tri.nearest_rod_distance_nm == pytest.approx(1.5)
    assert tri.rod_density_per_nm2 == pytest.approx(2 / (math.sqrt(3) * 1.5 ** 2))
    assert _coordination(tri) == 6
    sq = Lattice.from_preset("square", a=1.2, repeat=0.6)
    assert sq.nearest_rod_distance_nm == pytest.approx(1.2)
    assert sq.rod_density_per_nm2 == pytest.approx(1 / 1.44)
    assert _coordination(sq) == 4


def _coordination(lat):
    pts = lat.rod_positions_in_box(3)
    centre = lat.rods_frac[0] @ lat.cell_matrix.T
    d = np.sqrt(((pts - centre) ** 2).sum(1))
    return int(np.sum(np.abs(d - lat.nearest_rod_distance_nm) < 1e-6))


def test_rod_positions_count_matches_density():
    lat = Lattice.from_preset("honeycomb", a=2.6, repeat=0.68)
    r = 40.0
    n = lat.rod_positions(r).shape[0]
    expected = lat.rod_density_per_nm2 * math.pi * r * r
    assert abs(n - expected) / expected < 0.02


# ---------------------------------------------------------------------- schema and errors
GOOD = """
[cell]
a = 2.60
b = 2.60
gamma = 120.0
rods = [[0.3333, 0.0], [0.0, 0.3333]]
[rod]
repeat = 0.68
sites_per_repeat = 3
"""


def test_toml_roundtrip(tmp_path):
    p = tmp_path / "l.toml"
    p.write_text(GOOD)
    lat = Lattice.from_toml(p)
    assert lat.rods_per_cell == 2 and lat.pitch_nm == pytest.approx(0.68 / 3)
    q = tmp_path / "m.toml"
    q.write_text(lat.to_toml())
    lat2 = Lattice.from_toml(q)
    assert np.allclose(lat2.rods_frac, lat.rods_frac) and lat2.gamma_deg == lat.gamma_deg


@pytest.mark.parametrize("edit, needle", [
    (("a = 2.60", "a = -2.6"), "a must be a positive length"),
    (("b = 2.60", "b = 0"), "b must be a positive length"),
    (("gamma = 120.0", "gamma = 190.0"), "gamma"),
    (("rods = [[0.3333, 0.0], [0.0, 0.3333]]", "rods = [[1.5, 0.0]]"), "fractions in [0, 1]"),
    (("rods = [[0.3333, 0.0], [0.0, 0.3333]]", "rods = []"), "non-empty"),
    (("repeat = 0.68", "repeat = -1"), "repeat"),
    (("sites_per_repeat = 3", "sites_per_repeat = 0"), "sites_per_repeat"),
    (("sites_per_repeat = 3", "sites_per_repeat = 2.5"), "sites_per_repeat"),
    (("repeat = 0.68\n", ""), "missing field 'repeat'"),
    (("[rod]", "[rods]"), "missing table [rod]"),
    (("a = 2.60", "a = "), "malformed TOML"),
    (("rods = [[0.3333, 0.0], [0.0, 0.3333]]", "rods = [[0.3, 0.1, 0.2]]"), "[u, v]"),
])
def test_bad_lattice_files(tmp_path, edit, needle):
    p = tmp_path / "bad.toml"
    p.write_text(GOOD.replace(*edit))
    with pytest.raises(InputError) as e:
        Lattice.from_toml(p)
    msg = str(e.value)
    assert "\n" not in msg
    assert needle in msg


def test_coinciding_rods_are_one_or_rejected(tmp_path):
    lat = Lattice(2.0, 2.0, 90.0, np.array([[0.0, 0.0], [1.0, 1.0]]), 0.6, 3)
    assert lat.rods_per_cell == 1  # 0 and 1 are the same position in the cell
    with pytest.raises(InputError, match="coincide"):
        Lattice(2.0, 2.0, 90.0, np.array([[0.2, 0.2], [0.2, 0.2005]]), 0.6, 3)


def test_unknown_preset_and_missing_file(tmp_path):
    with pytest.raises(InputError, match="unknown lattice preset"):
        Lattice.from_preset("kagome", a=2, repeat=1)
    with pytest.raises(InputError, match="not found"):
        Lattice.from_toml(tmp_path / "nope.toml")
    with pytest.raises(InputError, match="needs --a"):
        Lattice.from_preset("square", a=None, repeat=1)


# ---------------------------------------------------------------------- symmetry
def test_symmetry_orders():
    # source: point groups of the 2-D nets (recalled from memory): honeycomb and triangular nets
    # have 6-fold rotation axes, the square net 4-fold, a rectangular net 2-fold.
    assert lattice_symmetry(Lattice.from_preset("honeycomb", a=2.6, repeat=0.68))[0] == 6
    assert lattice_symmetry(Lattice.from_preset("triangular", a=2.0, repeat=0.68))[0] == 6
    assert lattice_symmetry(Lattice.from_preset("square", a=1.2, repeat=0.68))[0] == 4
    assert lattice_symmetry(Lattice(1.0, 1.7, 90.0, np.array([[0.0, 0.0]]), 0.6, 3))[0] == 2
    # the two-node honeycomb (graphite-like) net is 6-fold about its hexagon centres, which the
    # search finds as a rotation about the origin followed by a shift
    two = Lattice(2.0, 2.0, 120.0, np.array([[0.0, 0.0], [1 / 3, 2 / 3]]), 0.6, 3)
    assert lattice_symmetry(two)[0] == 6
    # a small triangle of rods around the origin of a hexagonal cell: 3-fold only (a 60 deg turn
    # inverts the triangle, and no translate of an upright triangle is inverted)
    three = Lattice(2.0, 2.0, 120.0, np.array([[0.2, 0.0], [0.0, 0.2], [0.8, 0.8]]), 0.6, 3)
    assert lattice_symmetry(three)[0] == 3
    # three rods with no rotational symmetry
    none = Lattice(2.0, 2.3, 80.0, np.array([[0.0, 0.0], [0.2, 0.1], [0.5, 0.7]]), 0.6, 3)
    assert lattice_symmetry(none)[0] == 1


def test_symmetry_shift_maps_pattern_onto_itself():
    lat = Lattice(2.0, 2.0, 90.0, np.array([[0.1, 0.1]]), 0.6, 3)  # square net off the origin
    n, t = lattice_symmetry(lat)
    assert n == 4
    C = lat.cell_matrix
    rot = np.array([[0.0, -1.0], [1.0, 0.0]])
    moved = np.linalg.solve(C, rot @ C @ lat.rods_frac[0]) - t
    d = moved - lat.rods_frac[0]
    assert np.allclose(d - np.rint(d), 0, atol=1e-9)


# ---------------------------------------------------------------------- nearest-rod lookup
@pytest.mark.parametrize("lat", [
    Lattice.from_preset("honeycomb", a=2.6, repeat=0.68),
    Lattice.from_preset("square", a=1.2, repeat=0.68),
    Lattice(1.0, 1.6, 70.0, np.array([[0.0, 0.0], [0.35, 0.6]]), 0.6, 3),
])
def test_locator_matches_brute_force(lat, rng):
    d = lat.nearest_rod_distance_nm
    loc = RodLocator.build(lat, cutoff_nm=0.6 * d, n_grid=64)
    f = rng.uniform(-3, 3, (60_000, 2))
    ci, cj, code = loc.locate(f[:, 0], f[:, 1])
    bi, bj, bcode, d2 = loc.nearest_exact(f[:, 0], f[:, 1])
    assert np.array_equal(ci, bi) and np.array_equal(cj, bj)
    inside = np.sqrt(d2) <= 0.6 * d
    # exact within the cutoff, excluded beyond it
    assert np.array_equal(code[inside], bcode[inside])
    assert (code[~inside] == -1).all()
    # the same rod, seen from the cell, is at the brute-force distance
    rf = loc.rod_frac(ci[inside], cj[inside], code[inside])
    dd = (f[inside] - rf) @ lat.cell_matrix.T
    assert np.allclose((dd ** 2).sum(1), d2[inside])
    assert 0 < loc.fallback_share < 0.5


def test_locator_bad_grid():
    with pytest.raises(InputError, match="power of two"):
        RodLocator.build(Lattice.from_preset("square", a=1.2, repeat=0.6), 1.0, n_grid=100)
