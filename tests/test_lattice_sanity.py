"""A lattice constant or a length unit far off is never accepted silently by the registration.

Simulated runs with a known lattice (honeycomb, a = 2.6 nm) and a reconstruction at lateral
scale 1 are registered with a lattice given too large or too small, or with positions in
angstrom read as nm; the warning or the error must name the scale the data show and the lattice
constant they suggest.
"""

import math
import re
import warnings

import numpy as np
import pytest

from probeseq.exceptions import DataQualityWarning, InputError, ProbeseqWarning
from probeseq.lattice import sanity
from probeseq.lattice.model import Lattice
from probeseq.lattice.registration import register_lattice
from probeseq.simulation.simulate import simulate_run

A_TRUE = 2.6  # nm, the simulator's default honeycomb cell edge


def _metal_ions(**kw):
    cfg = {"pattern": "random", "depth_nm": 15, "top_radius_nm": 7, "scale": 1.0, "seed": 11}
    cfg.update(kw)
    run = simulate_run(**cfg)
    m = run.ion_metal >= 0
    return run.ions.x[m], run.ions.y[m], run.ions.z[m], run.lattice


@pytest.fixture(scope="module")
def sharp():
    return _metal_ions()


@pytest.fixture(scope="module")
def blurred():
    return _metal_ions(sigma_xy_nm=0.25, seed=12)


def _register_collect(x, y, z, lattice, **kw):
    """(registration or None, error message or None, warning messages)."""
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        try:
            reg, err = register_lattice(x, y, z, lattice, random_state=0, **kw), None
        except InputError as e:
            reg, err = None, str(e)
    return reg, err, [str(w.message) for w in rec if issubclass(w.category, ProbeseqWarning)]


def _named_scale(msg):
    return float(re.search(r"fits at lateral scale (\d+\.\d+)", msg).group(1))


def _suggested_a(msg):
    return float(re.search(r"the data suggest a = (\d+\.\d+) nm", msg).group(1))


# ---------------------------------------------------------------------- 20 % off: a warning
@pytest.mark.parametrize("factor, word", [(1.2, "too large"), (1 / 1.2, "too small")])
def test_lattice_20_percent_off_warns_with_scale_and_suggested_a(sharp, factor, word):
    x, y, z, lat = sharp
    with pytest.warns(DataQualityWarning) as rec:
        reg = register_lattice(x, y, z, lat.scaled(factor), random_state=0)
    assert reg.scale == pytest.approx(1 / factor, rel=0.02)
    msg = str(rec[0].message)
    assert _named_scale(msg) == pytest.approx(1 / factor, rel=0.02)
    assert _suggested_a(msg) == pytest.approx(A_TRUE, rel=0.05)
    assert f"a = {A_TRUE * factor:.2f} nm" in msg and word in msg
    # both causes and what to check, on one line
    assert "reconstruction's lateral scale" in msg and "--a" in msg and "\n" not in msg


def test_correct_lattice_draws_no_warning(sharp):
    x, y, z, lat = sharp
    with warnings.catch_warnings():
        warnings.simplefilter("error", ProbeseqWarning)
        reg = register_lattice(x, y, z, lat, random_state=0)
    assert abs(reg.scale - 1.0) < sanity.SCALE_WARN


def test_scale_given_by_the_user_draws_no_warning(sharp):
    x, y, z, lat = sharp
    with warnings.catch_warnings():
        warnings.simplefilter("error", ProbeseqWarning)
        reg = register_lattice(x, y, z, lat.scaled(1.2), scale=1 / 1.2, random_state=0)
    assert reg.scale == pytest.approx(1 / 1.2) and "scale" in reg.fixed


def test_blurred_data_correct_lattice_passes_and_20_percent_off_warns(blurred):
    # a poor resolution makes the registration look doubtful; the wide search must not overrule it
    x, y, z, lat = blurred
    reg, err, warned = _register_collect(x, y, z, lat)
    assert err is None and not warned and abs(reg.scale - 1) < 0.05
    reg, err, warned = _register_collect(x, y, z, lat.scaled(1.2))
    assert err is None and len(warned) == 1
    assert _named_scale(warned[0]) == pytest.approx(1 / 1.2, rel=0.03)


# ---------------------------------------------------------------------- far off: an error naming the scale
@pytest.mark.parametrize("factor", [2.0, 0.5])
def test_lattice_twice_off_names_the_scale_found(sharp, factor):
    x, y, z, lat = sharp
    _, err, warned = _register_collect(x, y, z, lat.scaled(factor))
    msg = err if err is not None else " ".join(warned)
    assert msg, "a lattice twice off was accepted silently"
    assert _named_scale(msg) == pytest.approx(1 / factor, rel=0.04)
    assert _suggested_a(msg) == pytest.approx(A_TRUE, rel=0.05)
    assert "\n" not in msg


def test_lattice_matching_part_of_the_pattern_is_not_accepted(sharp):
    # the primitive edge a / sqrt(3) given for the honeycomb cell edge: every rod of the data sits
    # on a rod of the (three times denser) lattice near scale 1, but the data fit at scale sqrt(3)
    x, y, z, lat = sharp
    reg, err, _ = _register_collect(x, y, z, lat.scaled(1 / math.sqrt(3)))
    assert reg is None and "only in part" in err
    assert _named_scale(err) == pytest.approx(math.sqrt(3), rel=0.03)
    assert _suggested_a(err) == pytest.approx(A_TRUE, rel=0.05)


def test_no_signal_names_the_scale_of_a_lattice_found_by_the_wide_search():
    # a triangular lattice given sqrt(3) too large: nothing in the normal scale range
    a = 1.5
    x, y, z, lat = _metal_ions(packing="triangular", a_nm=a, seed=12)
    with pytest.raises(InputError) as e:
        register_lattice(x, y, z, lat.scaled(math.sqrt(3)), random_state=0)
    msg = str(e.value)
    assert "no lattice signal" in msg and "a rod lattice fits at lateral scale" in msg
    assert _named_scale(msg) == pytest.approx(1 / math.sqrt(3), rel=0.02)
    assert _suggested_a(msg) == pytest.approx(a, rel=0.05) and "too large" in msg and "\n" not in msg


# ---------------------------------------------------------------------- units
def test_angstrom_read_as_nm_names_the_unit_option(sharp):
    x, y, z, lat = sharp
    with pytest.raises(InputError) as e:
        register_lattice(10 * x, 10 * y, 10 * z, lat, random_state=0)
    msg = str(e.value)
    assert "no lattice signal" in msg and "angstrom" in msg and "--length-unit angstrom" in msg
    assert "divided by 10" in msg and "metal ions per nm^3" in msg and "\n" not in msg


def test_specimen_wider_than_any_is_named():
    # a wide specimen (radius 20 nm) in angstrom spans about 200 "nm"
    x, y, z, lat = _metal_ions(top_radius_nm=20, depth_nm=6, seed=13)
    with pytest.raises(InputError) as e:
        register_lattice(10 * x, 10 * y, 10 * z, lat, random_state=0)
    assert re.search(r"98 % of the metal ions lie within \d+ nm of the centre", str(e.value))


def test_no_signal_in_noise_keeps_the_plain_causes():
    rng = np.random.default_rng(5)
    n = 20_000
    r = 8 * np.sqrt(rng.random(n))
    t = rng.uniform(0, 2 * np.pi, n)
    lat = Lattice.from_preset("honeycomb", a=A_TRUE, repeat=0.68)
    with pytest.raises(InputError) as e:
        register_lattice(r * np.cos(t), r * np.sin(t), rng.uniform(0, 20, n), lat, random_state=0)
    msg = str(e.value)
    assert "too few metal ions" in msg and "not a crystal" in msg and "wrong metals ranged" in msg
    assert "angstrom read as nm" not in msg and "fits at lateral scale" not in msg
    assert "--rotation-deg" in msg and "\n" not in msg


def test_density_of_a_block_sample_is_the_local_one():
    # uniform cylinder of radius 10 nm, 3 ions per nm^3; keeping one depth block of 1000 ions in
    # eight (as the pipeline's bounded sample does, with blocks of thousands of ions) must not lower
    # the density found, while the count over the bounding volume drops eightfold
    rng = np.random.default_rng(0)
    R, depth, rho = 10.0, 250.0, 3.0
    n = int(rho * math.pi * R * R * depth)
    z = np.sort(rng.uniform(0, depth, n))
    assert sanity.metal_ion_density(z, R) == pytest.approx(rho, rel=0.1)
    blocks = np.array_split(np.arange(n), n // 1000)
    kept = z[np.concatenate(blocks[::8])]
    assert kept.size / (math.pi * R * R * np.ptp(kept)) < rho / 6
    assert sanity.metal_ion_density(kept, R) == pytest.approx(rho, rel=0.15)


def test_scale_hint_numbers():
    lat = Lattice.from_preset("honeycomb", a=2.6, repeat=0.68)
    hint = sanity.scale_hint(lat, 0.82)
    assert "a = 2.60 nm looks 22 % too large" in hint and "suggest a = 2.13 nm" in hint
    hint = sanity.scale_hint(lat, 1.25)
    assert "20 % too small" in hint and "suggest a = 3.25 nm" in hint


# ---------------------------------------------------------------------- cost
def test_wide_search_runs_only_off_the_normal_path(sharp, monkeypatch):
    calls = []
    real = sanity.wide_candidates

    def counted(*a, **k):
        calls.append(1)
        return real(*a, **k)

    monkeypatch.setattr(sanity, "wide_candidates", counted)
    x, y, z, lat = sharp
    register_lattice(x, y, z, lat, random_state=0)
    assert calls == []  # the normal path: no wide search
    with pytest.warns(DataQualityWarning):
        register_lattice(x, y, z, lat.scaled(1.2), random_state=0)
    assert calls  # the counter sees the doubtful path
